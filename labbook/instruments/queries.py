from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

from django.db.models import Q, QuerySet
from django.utils import timezone

from labbook.instruments.models import Channel, Instrument, InstrumentEvent, Reading


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
