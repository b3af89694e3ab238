from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

from django.db import connection
from django.db.models import Q, QuerySet
from django.utils import timezone

from labbook.instruments.models import Chamber, Channel, Instrument, InstrumentEvent, Reading


def instruments_for(user) -> QuerySet[Instrument]:
    return Instrument.objects.filter(retired_at__isnull=True)


def channels_of(instrument: Instrument) -> QuerySet[Channel]:
    return instrument.channels.filter(retired_at__isnull=True).select_related("chamber")


@dataclass(frozen=True)
class LatestReading:
    channel: Channel
    t: datetime | None
    value: float | None
    age: timedelta | None


def latest_readings(instrument: Instrument, at: datetime | None = None) -> list[LatestReading]:
    """The last reading of each of the instrument's channels at or before ``at``.

    One index probe per channel on (channel, t): a handful of channels costs a handful of
    sub-millisecond lookups, where a DISTINCT ON over all readings would scan them all.
    """
    at = at or timezone.now()
    latest = []
    for channel in channels_of(instrument):
        row = (
            Reading.objects.filter(channel=channel, t__lte=at)
            .order_by("-t")
            .values_list("t", "value")
            .first()
        )
        t, value = row if row else (None, None)
        latest.append(
            LatestReading(channel=channel, t=t, value=value, age=None if t is None else at - t)
        )
    return latest


def reading_count(instrument: Instrument | None = None, *, since: datetime | None = None) -> int:
    readings = Reading.objects.all()
    if instrument is not None:
        readings = readings.filter(channel__instrument=instrument)
    if since is not None:
        readings = readings.filter(t__gte=since)
    return readings.count()


def events_between(
    instrument: Instrument,
    since: datetime | None = None,
    until: datetime | None = None,
    *,
    kind: str | None = None,
) -> QuerySet[InstrumentEvent]:
    """Events that overlap [since, until]: an open event (no end) overlaps everything after it."""
    events = instrument.events.filter(retired_at__isnull=True)
    if until is not None:
        events = events.filter(start__lte=until)
    if since is not None:
        events = events.filter(Q(end__isnull=True) | Q(end__gte=since))
    if kind is not None:
        events = events.filter(kind=kind)
    return events.order_by("start")


# --- the instrument's state at an instant -----------------------------------------------------

#: After a cryogen transfer the microscope drifts and the bath bubbles; data taken within this
#: window are flagged (2 h, common practice).
AFTER_TRANSFER_WINDOW = timedelta(hours=2)
#: A channel with no expected interval is stale after an hour without a reading.
DEFAULT_STALE_AFTER = timedelta(hours=1)
STALE_FACTOR = 3


@dataclass(frozen=True)
class ChannelState:
    channel: Channel
    t: datetime | None
    value: float | None
    age: timedelta | None
    flags: tuple[str, ...]
    vacuum_range: object | None = None  # labbook.science.vacuum.VacuumRange for pressures


@dataclass(frozen=True)
class InstrumentState:
    instrument: Instrument
    at: datetime
    channels: list[ChannelState]
    flags: tuple[str, ...]
    events: list[InstrumentEvent]


_LATEST_PER_CHANNEL_SQL = """
SELECT c.id, r.t, r.value
FROM instruments_channel c
LEFT JOIN LATERAL (
    SELECT r.t, r.value FROM instruments_reading r
    WHERE r.channel_id = c.id AND r.t <= %s
    ORDER BY r.t DESC
    LIMIT 1
) r ON true
WHERE c.instrument_id = %s AND c.retired_at IS NULL
"""


def latest_values(instrument: Instrument, at: datetime) -> dict[int, tuple[datetime, float]]:
    """{channel id: (t, value)} of the last reading at or before ``at``, per channel.

    On PostgreSQL one LATERAL query: an index probe per channel on (channel_id, t), newest
    partition first (PERFORMANCE.md: 0.34 ms for 20 channels, where the ORM's DISTINCT ON
    scans every reading). Elsewhere one probe per channel through the ORM.
    """
    if connection.vendor == "postgresql":
        with connection.cursor() as cursor:
            cursor.execute(_LATEST_PER_CHANNEL_SQL, [at, instrument.pk])
            return {cid: (t, value) for cid, t, value in cursor.fetchall() if t is not None}
    found = {}
    for channel_id in instrument.channels.filter(retired_at__isnull=True).values_list(
        "pk", flat=True
    ):
        row = (
            Reading.objects.filter(channel_id=channel_id, t__lte=at)
            .order_by("-t")
            .values_list("t", "value")
            .first()
        )
        if row:
            found[channel_id] = row
    return found


def _channel_flags(channel: Channel, value: float | None, age: timedelta | None):
    from labbook.science.errors import ScienceInputError
    from labbook.science.units import convert
    from labbook.science.vacuum import vacuum_range

    flags = []
    if value is None:
        return ("no_reading",), None
    stale_after = (
        timedelta(seconds=STALE_FACTOR * channel.expected_interval_s)
        if channel.expected_interval_s
        else DEFAULT_STALE_AFTER
    )
    if age is not None and age > stale_after:
        flags.append("stale")
    found_range = None
    if channel.quantity == Channel.Quantity.PRESSURE:
        try:
            found_range = vacuum_range(convert(value, channel.unit, "mbar"))
        except ScienceInputError:
            flags.append("not_a_vacuum")
        else:
            if found_range.name not in ("ultra-high", "extreme-high"):
                flags.append("above_uhv")
    return tuple(flags), found_range


def state_at(instrument: Instrument, at: datetime) -> InstrumentState:
    """The latest reading of every channel at or before ``at`` with its age and flags, and
    the instrument's flags: a bake-out or a cryogen transfer under way, or a transfer within
    the last two hours (drift and bubbling)."""
    latest = latest_values(instrument, at)
    channel_states = []
    for channel in channels_of(instrument):
        t, value = latest.get(channel.pk, (None, None))
        age = None if t is None else at - t
        flags, found_range = _channel_flags(channel, value, age)
        channel_states.append(ChannelState(channel, t, value, age, flags, found_range))

    events = list(
        events_between(instrument, at - AFTER_TRANSFER_WINDOW, at).select_related("chamber")
    )
    flags = set()
    for event in events:
        under_way = event.start <= at and (event.end is None or event.end >= at)
        if event.kind == InstrumentEvent.Kind.CRYOGEN_TRANSFER:
            flags.add("cryogen_transfer_under_way" if under_way else "after_cryogen_transfer")
        elif event.kind == InstrumentEvent.Kind.BAKEOUT and under_way:
            flags.add("bakeout_under_way")
        elif event.kind == InstrumentEvent.Kind.VENT and under_way:
            # Venting the load lock for a sample load leaves the microscope in vacuum.
            in_load_lock = (
                event.chamber is not None and event.chamber.kind == Chamber.Kind.LOAD_LOCK
            )
            flags.add("load_lock_vented" if in_load_lock else "vented")
    # A load lock between sample loads sits at 1e-8-1e-7 mbar by design: only the chambers
    # where samples are prepared and measured raise the instrument's "above UHV" flag.
    if any(
        "above_uhv" in c.flags
        and not (c.channel.chamber is not None and c.channel.chamber.kind == Chamber.Kind.LOAD_LOCK)
        for c in channel_states
    ):
        flags.add("pressure_above_uhv")
    return InstrumentState(instrument, at, channel_states, tuple(sorted(flags)), events)


def readings_between(
    channel: Channel, since: datetime, until: datetime, *, limit: int | None = None
) -> list[tuple[datetime, float]]:
    """(t, value) pairs of one channel in [since, until], oldest first: plain tuples, since
    building model instances costs more than the query (PERFORMANCE.md §6)."""
    rows = (
        Reading.objects.filter(channel=channel, t__gte=since, t__lte=until)
        .order_by("t")
        .values_list("t", "value")
    )
    if limit is not None:
        rows = rows[:limit]
    return list(rows)


def instrument_named(value: str | int) -> Instrument | None:
    """An instrument by id (an int or a digit string) or by its name; None if there is none."""
    text = str(value).strip()
    lookup = {"pk": int(text)} if text.isdigit() else {"name": text}
    return Instrument.objects.filter(**lookup).first()
