from __future__ import annotations

import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import NamedTuple

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


def latest_reading_time(channel: Channel, at: datetime) -> datetime | None:
    """When ``channel`` last logged at or before ``at``: one probe on (channel_id, t)."""
    return (
        Reading.objects.filter(channel=channel, t__lte=at)
        .order_by("-t")
        .values_list("t", flat=True)
        .first()
    )


def readings_upto(channel: Channel, since: datetime, until: datetime, cap: int) -> int:
    """How many readings ``channel`` has in [since, until], counted no further than ``cap``:
    enough to choose between raw points and an envelope without counting a year of rows."""
    return (
        Reading.objects.filter(channel=channel, t__gte=since, t__lte=until)
        .values_list("t")[:cap]
        .count()
    )


# --- the min/max envelope of readings, reduced in the database ---------------------------------


class EnvelopeBucket(NamedTuple):
    """One stretch of the grid that holds readings: its first and last reading's instant, the
    smallest and largest value in it, and how many readings it holds."""

    index: int
    first_t: datetime
    last_t: datetime
    low: float
    high: float
    count: int


@dataclass(frozen=True)
class ReadingEnvelope:
    """Per channel, the buckets of the grid ``origin + k * width`` (k = 0, 1, …) that hold
    readings, oldest first. Bucket k holds the readings with
    ``origin + k·width <= t < origin + (k+1)·width``; empty buckets are left out, so a logger
    outage stays a gap."""

    origin: datetime
    width: timedelta
    buckets: int
    channels: dict[int, list[EnvelopeBucket]]


#: Finite doubles only: a gauge switched off may log NaN or ±inf on PostgreSQL (NaN sorts above
#: every number there), and one such value would become a bucket's maximum.
_FINITE = "value BETWEEN -1.7976931348623157e308 AND 1.7976931348623157e308"

# One aggregate per channel and bucket over that bucket's stretch of the covering key
# (channel_id, t) INCLUDE (value): an index-only range scan each, in key order, so nothing is
# sorted or hashed. A GROUP BY date_bin(width, t, origin) gives the same rows, but the planner
# cannot know that date_bin keeps t's order: it sorts every row of the window first (spilling
# to disk at the stock 4 MB work_mem) and took 270 ms for a year of one-minute readings where
# this takes 150 ms (labbook/bench/plots_bench.py). The constant bounds on t prune the yearly
# partitions at plan time; the per-bucket bounds prune them again per bucket at run time.
_ENVELOPE_SQL_POSTGRESQL = f"""
/* reading_envelope */
SELECT c.id, g.k, a.first_t, a.last_t, a.low, a.high, a.n
FROM unnest(%(channels)s::bigint[]) AS c(id)
CROSS JOIN generate_series(0, %(last_bucket)s) AS g(k)
CROSS JOIN LATERAL (
    SELECT min(r.t) AS first_t, max(r.t) AS last_t,
           min(r.value) AS low, max(r.value) AS high, count(*) AS n
    FROM instruments_reading r
    WHERE r.channel_id = c.id
      AND r.t >= %(origin)s::timestamptz + g.k * %(width)s::interval
      AND r.t < %(origin)s::timestamptz + (g.k + 1) * %(width)s::interval
      AND r.t >= %(since)s AND r.t <= %(until)s AND r.{_FINITE}
) AS a
WHERE a.n > 0
ORDER BY c.id, g.k
"""  # noqa: S608 - constants only; every value is a parameter

# Django keeps SQLite datetimes as naive-UTC text; strftime('%s') gives whole epoch seconds,
# and since origin and width are whole seconds, floor((floor(t) - origin) / width) is the same
# bucket as floor((t - origin) / width) (floor(floor(x) / n) = floor(x / n) for whole n).
_ENVELOPE_SQL_SQLITE = f"""
/* reading_envelope */
SELECT channel_id,
       (CAST(strftime('%%s', t) AS INTEGER) - %(origin_s)s) / %(width_s)s AS bucket,
       min(t), max(t), min(value), max(value), count(*)
FROM instruments_reading
WHERE channel_id IN (SELECT value FROM json_each(%(channels_json)s))
  AND t >= %(since)s AND t <= %(until)s AND {_FINITE}
GROUP BY channel_id, bucket
ORDER BY channel_id, bucket
"""  # noqa: S608 - constants only; every value is a parameter


def envelope_grid(since: datetime, until: datetime, buckets: int) -> tuple[datetime, timedelta]:
    """(origin, width) of the grid :func:`reading_envelope` reduces [since, until] onto.

    Both are whole seconds, so the database buckets with integer arithmetic and both backends
    agree to the reading: origin is ``since`` rounded down to the second, and the width is the
    smallest whole number of seconds for which ``buckets`` buckets reach past ``until``, so a
    reading at ``until`` falls in the last bucket, never in one more.
    """
    if isinstance(buckets, bool) or not isinstance(buckets, int) or buckets < 1:
        raise ValueError(f"buckets must be a whole number of at least 1, got {buckets!r}")
    if since.tzinfo is None or until.tzinfo is None:
        raise ValueError("since and until need a time zone")
    if until < since:
        raise ValueError(f"until {until.isoformat()} is before since {since.isoformat()}")
    origin_s = math.floor(since.timestamp())
    span_s = math.ceil(until.timestamp()) - origin_s
    width_s = span_s // buckets + 1
    return datetime.fromtimestamp(origin_s, tz=UTC), timedelta(seconds=width_s)


def reading_envelope(
    channel_ids: Sequence[int], since: datetime, until: datetime, buckets: int
) -> ReadingEnvelope:
    """The smallest and largest reading of each channel in each of about ``buckets`` equal
    stretches of [since, until], computed by the database in one query.

    This is :func:`labbook.science.timeseries.minmax_buckets` done where the rows are: a year
    of one-minute readings (half a million rows a channel) comes back as a thousand or two
    rows instead of travelling to Python. On PostgreSQL the rows come from index-only scans of
    the covering primary key (channel_id, t) INCLUDE (value), one range a bucket, pruned to
    the years the window touches; on SQLite a GROUP BY on the integer division of the epoch
    second, over a search of the same composite key. Non-finite values are left out, as
    ``minmax_buckets`` leaves them out.
    """
    origin, width = envelope_grid(since, until, buckets)
    ids = sorted({int(i) for i in channel_ids})
    found: dict[int, list[EnvelopeBucket]] = {i: [] for i in ids}
    if not ids:
        return ReadingEnvelope(origin, width, buckets, found)
    with connection.cursor() as cursor:
        if connection.vendor == "postgresql":
            cursor.execute(
                _ENVELOPE_SQL_POSTGRESQL,
                {
                    "channels": ids,
                    "last_bucket": (until - origin) // width,
                    "origin": origin,
                    "width": width,
                    "since": since,
                    "until": until,
                },
            )
            rows = cursor.fetchall()
        else:
            adapt = connection.ops.adapt_datetimefield_value
            cursor.execute(
                _ENVELOPE_SQL_SQLITE,
                {
                    "origin_s": int(origin.timestamp()),
                    "width_s": int(width.total_seconds()),
                    "channels_json": json.dumps(ids),
                    "since": adapt(since),
                    "until": adapt(until),
                },
            )
            rows = [
                (cid, bucket, _sqlite_instant(first), _sqlite_instant(last), low, high, n)
                for cid, bucket, first, last, low, high, n in cursor.fetchall()
            ]
    for cid, bucket, first, last, low, high, n in rows:
        found[cid].append(EnvelopeBucket(int(bucket), first, last, low, high, n))
    return ReadingEnvelope(origin, width, buckets, found)


def _sqlite_instant(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=UTC)
