"""Read-side queries of tips, their mounting periods and conditioning events; other apps (the
logbook, datasets, provenance) read tips through these.

Mounting periods are half-open [start, end): at the instant one tip comes out and the next
goes in, the new one is the mounted tip.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime

from django.db.models import Prefetch, Q, QuerySet
from django.utils import timezone

from labbook.instruments.models import Instrument
from labbook.tips.models import Conditioning, Tip, TipMount

# Reshaping the apex this way loses a picked-up molecule or atom (a CO or Xe tip is gone after
# a field emission, a pulse or a poke into the metal), so the apex species is forgotten unless
# the event itself names the new one (an indentation into Cu coats the apex with Cu).
_RESHAPING = frozenset(
    {
        Conditioning.Kind.FIELD_EMISSION,
        Conditioning.Kind.PULSE,
        Conditioning.Kind.INDENTATION,
    }
)


def tips() -> QuerySet[Tip]:
    """Tips in use (not retired)."""
    return Tip.objects.filter(retired_at__isnull=True)


def _live_mounts() -> QuerySet[TipMount]:
    return TipMount.objects.filter(retired_at__isnull=True)


def _covering(at: datetime) -> Q:
    return Q(start__lte=at) & (Q(end__isnull=True) | Q(end__gt=at))


def tips_with_current_mount(at: datetime | None = None) -> QuerySet[Tip]:
    """Tips with ``current_mounts`` (a list of zero or one mount, with its instrument)
    prefetched: two queries for any number of tips."""
    at = at or timezone.now()
    current = _live_mounts().filter(_covering(at)).select_related("instrument")
    return tips().prefetch_related(Prefetch("mounts", queryset=current, to_attr="current_mounts"))


def mounts_of(tip: Tip) -> QuerySet[TipMount]:
    """Every mounting period of a tip, oldest first, with its instrument."""
    return _live_mounts().filter(tip=tip).select_related("instrument").order_by("start", "pk")


def mounts_on(instrument: Instrument) -> QuerySet[TipMount]:
    """Every mounting period on an instrument with its tip (the logbook orders and windows)."""
    return _live_mounts().filter(instrument=instrument).select_related("tip")


def tip_mounted(instrument: Instrument, at: datetime | None = None) -> TipMount | None:
    """The mount of the tip that sat in ``instrument``'s scanner at ``at`` (now by default)."""
    at = at or timezone.now()
    return (
        _live_mounts()
        .filter(_covering(at), instrument=instrument)
        .select_related("tip", "instrument")
        .order_by("-start")
        .first()
    )


def mount_of(tip: Tip, at: datetime | None = None) -> TipMount | None:
    """The mount of ``tip`` at ``at`` (now by default), or None when it was in no scanner."""
    at = at or timezone.now()
    return (
        _live_mounts()
        .filter(_covering(at), tip=tip)
        .select_related("tip", "instrument")
        .order_by("-start")
        .first()
    )


def overlapping_mounts(
    *,
    start: datetime,
    end: datetime | None,
    instrument: Instrument | None = None,
    tip: Tip | None = None,
    exclude: TipMount | None = None,
) -> QuerySet[TipMount]:
    """Mounts of ``instrument`` (or of ``tip``) whose period shares an instant with
    [start, end); an open period (no end) runs on for ever."""
    mounts = _live_mounts().filter(Q(end__isnull=True) | Q(end__gt=start))
    if end is not None:
        mounts = mounts.filter(start__lt=end)
    if instrument is not None:
        mounts = mounts.filter(instrument=instrument)
    if tip is not None:
        mounts = mounts.filter(tip=tip)
    if exclude is not None:
        mounts = mounts.exclude(pk=exclude.pk)
    return mounts.select_related("tip", "instrument").order_by("start", "pk")


def conditioning_of(
    tip: Tip, since: datetime | None = None, until: datetime | None = None
) -> QuerySet[Conditioning]:
    """A tip's conditioning events in [since, until], oldest first."""
    events = Conditioning.objects.filter(tip=tip, retired_at__isnull=True)
    if since is not None:
        events = events.filter(at__gte=since)
    if until is not None:
        events = events.filter(at__lte=until)
    return events.order_by("at", "pk")


def conditioning_on(instrument: Instrument) -> QuerySet[Conditioning]:
    """Every conditioning event that happened on an instrument, with its tip."""
    return Conditioning.objects.filter(
        instrument=instrument, retired_at__isnull=True
    ).select_related("tip")


@dataclass
class TipState:
    """The tip behind whatever was measured at ``at``: the tip, its mount, and everything done
    to it since it was mounted (oldest first). A tip ID alone is not enough (FIELD.md §2)."""

    tip: Tip
    at: datetime
    mount: TipMount | None
    events: list[Conditioning] = field(default_factory=list)
    apex_species: str | None = None

    @property
    def instrument(self) -> Instrument | None:
        return None if self.mount is None else self.mount.instrument

    @property
    def is_mounted(self) -> bool:
        return self.mount is not None


def apex_species(events: list[Conditioning]) -> str | None:
    """What the apex carries after these events (oldest first): the species of the last
    functionalisation, unless a later reshaping event took it off (see ``_RESHAPING``)."""
    species = None
    for event in events:
        named = event.params.get("species") if isinstance(event.params, dict) else None
        if event.kind == Conditioning.Kind.FUNCTIONALISATION or event.kind in _RESHAPING:
            species = named or None
    return species


def tip_state(tip_or_instrument: Tip | Instrument, at: datetime | None = None) -> TipState | None:
    """The tip state at ``at`` (now by default): of a tip, or of whatever tip was in an
    instrument's scanner then.

    Events since the mount are the tip's conditioning from the mount's start up to ``at``; events
    before the mount (an earlier stay in another microscope) are not part of this state. For an
    instrument with no tip mounted at ``at`` the answer is None; for a tip in no scanner, a state
    with no mount and no events. Two queries whatever the length of the tip's history.
    """
    at = at or timezone.now()
    if isinstance(tip_or_instrument, Instrument):
        mount = tip_mounted(tip_or_instrument, at)
        if mount is None:
            return None
        tip = mount.tip
    else:
        tip = tip_or_instrument
        mount = mount_of(tip, at)
    if mount is None:
        return TipState(tip=tip, at=at, mount=None)
    events = list(conditioning_of(tip, since=mount.start, until=at))
    return TipState(tip=tip, at=at, mount=mount, events=events, apex_species=apex_species(events))
