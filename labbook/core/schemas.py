"""Field types every API router shares: zone-aware instants and quantities with units.

Numbers may be sent in the unit the field name carries or as strings with any unit pint
converts ("15 min", "32.8 kHz"); times need a zone (Z or an offset) and are answered in UTC.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from typing import Annotated, Any

from pydantic import AfterValidator, BeforeValidator, PlainValidator, ValidationInfo, WithJsonSchema
from pydantic_core import PydanticCustomError

from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity

# A "+01:00" offset in a query string arrives as " 01:00" when the caller did not percent-encode
# it (a plain `curl ...?at=2026-03-02T09:00:00+01:00`); read it as the offset it was meant to be.
_OFFSET_LOST_TO_A_SPACE = re.compile(r"(T\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?) (\d{2}:?\d{2})$")


def _restore_plus(value: Any) -> Any:
    if isinstance(value, str):
        return _OFFSET_LOST_TO_A_SPACE.sub(r"\1+\2", value.strip())
    return value


def _aware_utc(value: datetime) -> datetime:
    # Storage is UTC (DESIGN §2): a time without a zone could be the lab's, the chamber PC's or
    # UTC, and guessing would shift a preparation or a tip exchange by hours.
    if value.tzinfo is None or value.utcoffset() is None:
        raise PydanticCustomError(
            "time_zone_needed",
            "needs a time zone: end it with Z (UTC) or an offset such as +01:00",
        )
    return value.astimezone(UTC)


AwareTime = Annotated[datetime, BeforeValidator(_restore_plus), AfterValidator(_aware_utc)]


def quantity(unit: str, *, positive: bool = False, non_negative: bool = False) -> Any:
    """A number in ``unit``, or a string with any unit pint converts to it ("15 min")."""

    def read(value: Any, info: ValidationInfo) -> float:
        name = info.field_name or "value"
        try:
            number = parse_quantity(value, unit, field=name)
        except ScienceInputError as exc:
            raise PydanticCustomError(
                "quantity", "{message}", {"message": str(exc).removeprefix(f"{name}: ")}
            ) from None
        if positive and not number > 0:
            raise PydanticCustomError("quantity", f"must be more than 0 {unit}, got {number:g}")
        if non_negative and number < 0:
            raise PydanticCustomError("quantity", f"must not be negative, got {number:g}")
        return number

    return Annotated[
        float,
        PlainValidator(read),
        WithJsonSchema(
            {
                "anyOf": [{"type": "number"}, {"type": "string"}],
                "description": f"in {unit}, or a string with a unit",
            }
        ),
    ]
