"""Every change to instruments, chambers and channels goes through here (views, API, commands)."""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction

from labbook.accounts.permissions import require_manager, require_member
from labbook.core.records import save_record
from labbook.instruments.models import Chamber, Channel, Instrument, InstrumentEvent
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity


@transaction.atomic
def create_instrument(
    *, name: str, description: str = "", time_zone: str = "UTC", actor
) -> Instrument:
    require_manager(actor)
    return save_record(Instrument(name=name, description=description, time_zone=time_zone), actor)


@transaction.atomic
def add_chamber(instrument: Instrument, *, name: str, kind: str, actor) -> Chamber:
    require_manager(actor)
    return save_record(Chamber(instrument=instrument, name=name, kind=kind), actor)


@transaction.atomic
def create_channel(
    instrument: Instrument,
    *,
    name: str,
    quantity: str,
    unit: str,
    location: str = "",
    gas: str = "",
    chamber: Chamber | None = None,
    expected_interval_s: float | None = None,
    actor,
) -> Channel:
    require_member(actor)
    try:
        parse_quantity(1.0, unit, field="unit")
    except ScienceInputError:
        raise ValidationError(
            {"unit": f"{unit!r} is not a unit labbook can convert (e.g. mbar, K, %)"}
        ) from None
    channel = Channel(
        expected_interval_s=expected_interval_s,
        instrument=instrument,
        chamber=chamber,
        name=name,
        quantity=quantity,
        unit=unit,
        location=location,
        gas=gas,
    )
    return save_record(channel, actor)


@transaction.atomic
def record_event(
    instrument: Instrument,
    *,
    kind: str,
    start,
    end=None,
    summary: str = "",
    details: dict | None = None,
    chamber: Chamber | None = None,
    actor,
) -> InstrumentEvent:
    """Log a bake-out, a cryogen transfer, a vent … on the instrument's timeline."""
    require_member(actor)
    if end is not None and end < start:
        raise ValidationError({"end": "the event ends before it starts"})
    if chamber is not None and chamber.instrument_id != instrument.pk:
        raise ValidationError({"chamber": f"{chamber} is not a chamber of {instrument}"})
    event = InstrumentEvent(
        instrument=instrument,
        chamber=chamber,
        kind=kind,
        start=start,
        end=end,
        summary=summary,
        details=details or {},
        recorded_by=actor if getattr(actor, "is_authenticated", False) else None,
    )
    return save_record(event, actor)
