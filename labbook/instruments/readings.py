"""Bulk readings from loggers: validated row by row, converted to each channel's unit, and
written in one statement. A bad row is rejected with its index and reason; the good rows of the
same batch are kept. The same (channel, t) twice is one reading, so a logger can resend a batch
after a timeout without doubling anything."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

from django.db import connection, transaction

from labbook.accounts.permissions import PermissionDenied
from labbook.instruments.models import Channel
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_many

#: A batch larger than this is refused whole: it would hold a transaction for too long.
MAX_BATCH = 50_000
PLAUSIBLE_FUTURE = timedelta(days=1)
EARLIEST_READING = datetime(1990, 1, 1, tzinfo=UTC)


@dataclass
class BatchResult:
    accepted: int = 0  # rows that are now stored: new ones plus resends already present
    inserted: int = 0
    duplicates: int = 0
    rejected: list[dict[str, Any]] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {
            "accepted": self.accepted,
            "inserted": self.inserted,
            "duplicates": self.duplicates,
            "rejected": self.rejected,
        }


def parse_instant(value: Any) -> datetime:
    """An ISO 8601 instant with its zone, as an aware UTC datetime."""
    if not isinstance(value, str):
        raise ValueError("t must be an ISO 8601 string with a zone, e.g. 2026-03-02T09:00:00Z")
    try:
        instant = datetime.fromisoformat(value.strip())
    except ValueError:
        raise ValueError(f"t {value!r} is not an ISO 8601 instant") from None
    if instant.tzinfo is None:
        raise ValueError(f"t {value!r} has no time zone; add Z or an offset such as +01:00")
    instant = instant.astimezone(UTC)
    # A chamber PC whose clock was reset logs the year 2000 or a future date; such readings
    # would silently land outside every plot, so they are refused with the reason.
    if instant > datetime.now(UTC) + PLAUSIBLE_FUTURE:
        raise ValueError(f"t {value!r} is in the future: check the logging computer's clock")
    if instant < EARLIEST_READING:
        raise ValueError(
            f"t {value!r} is before {EARLIEST_READING:%Y}: check the logging computer's clock"
        )
    return instant


def _channels(ids: Iterable[Any]) -> dict[int, tuple[int, str]]:
    wanted = {i for i in ids if isinstance(i, int) and not isinstance(i, bool)}
    rows = Channel.objects.filter(pk__in=wanted, retired_at__isnull=True).values_list(
        "pk", "instrument_id", "unit"
    )
    return {pk: (instrument_id, unit) for pk, instrument_id, unit in rows}


def validate_rows(
    rows: Sequence[Any], *, access=None
) -> tuple[list[tuple[int, datetime, float]], list[dict[str, Any]], int]:
    """(valid rows, rejections, duplicates within the batch). ``access`` is the API caller;
    an instrument-scoped token's rows for another instrument are rejected, not the batch."""
    channels = _channels(row.get("channel") for row in rows if isinstance(row, Mapping))
    valid: list[tuple[int, datetime, float]] = []
    rejected: list[dict[str, Any]] = []
    seen: set[tuple[int, datetime]] = set()
    duplicates = 0
    allowed_cache: dict[int, str | None] = {}
    for index, row in enumerate(rows):
        try:
            if not isinstance(row, Mapping):
                raise ValueError("a reading is an object {channel, t, value}")
            extra = set(row) - {"channel", "t", "value"}
            if extra:
                raise ValueError(f"unknown field(s) {', '.join(sorted(map(str, extra)))}")
            channel_id = row.get("channel")
            if channel_id not in channels:
                raise ValueError(f"channel {channel_id!r} does not exist (give a channel id)")
            instrument_id, unit = channels[channel_id]
            if access is not None:
                if instrument_id not in allowed_cache:
                    try:
                        access.require_write(instrument_id=instrument_id)
                        allowed_cache[instrument_id] = None
                    except PermissionDenied as exc:
                        allowed_cache[instrument_id] = str(exc)
                if allowed_cache[instrument_id]:
                    raise ValueError(allowed_cache[instrument_id])
            if "value" not in row:
                raise ValueError("value is missing")
            t = parse_instant(row.get("t"))
            value = parse_many(row["value"], unit, field="value")
        except (ValueError, ScienceInputError) as exc:
            rejected.append({"index": index, "error": str(exc)})
            continue
        key = (channel_id, t)
        if key in seen:
            duplicates += 1
            continue
        seen.add(key)
        valid.append((channel_id, t, value))
    return valid, rejected, duplicates


def insert_readings(valid: Sequence[tuple[int, datetime, float]]) -> int:
    """Insert, skipping instants already stored; returns how many rows are new."""
    if not valid:
        return 0
    with transaction.atomic(), connection.cursor() as cursor:
        if connection.vendor == "postgresql":
            # One statement for the whole batch: arrays unnested server-side.
            channel_ids, instants, values = zip(*valid, strict=True)
            cursor.execute(
                "INSERT INTO instruments_reading (channel_id, t, value) "
                "SELECT * FROM unnest(%s::bigint[], %s::timestamptz[], %s::float8[]) "
                "ON CONFLICT (channel_id, t) DO NOTHING",
                [list(channel_ids), list(instants), list(values)],
            )
            return cursor.rowcount
        # The backend's own datetime text (naive UTC), so the key matches what the ORM writes.
        adapt = connection.ops.adapt_datetimefield_value
        before = connection.connection.total_changes
        cursor.executemany(
            "INSERT OR IGNORE INTO instruments_reading (channel_id, t, value) VALUES (%s, %s, %s)",
            [(channel_id, adapt(t), value) for channel_id, t, value in valid],
        )
        return connection.connection.total_changes - before


def record_readings(rows: Sequence[Any], *, access=None) -> BatchResult:
    if len(rows) > MAX_BATCH:
        raise ValueError(f"a batch holds at most {MAX_BATCH} readings; got {len(rows)}")
    valid, rejected, in_batch_duplicates = validate_rows(rows, access=access)
    inserted = insert_readings(valid)
    already_stored = len(valid) - inserted
    return BatchResult(
        accepted=len(valid) + in_batch_duplicates,
        inserted=inserted,
        duplicates=already_stored + in_batch_duplicates,
        rejected=rejected,
    )
