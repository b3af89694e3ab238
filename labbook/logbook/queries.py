"""Read-side queries of sessions, notes and the instrument's timeline; other apps read through
these.

The timeline (the instrument's logbook) has no table: it is composed, newest first, from
*timeline sources*, one a kind of entry, each a function ``(instrument, since, until, *, q,
limit)`` that returns ``TimelineEntry`` items. Sessions, notes, preparations, sample transfers,
tip mounts, tip conditioning and instrument events are registered here; other apps add theirs
(datasets, refills, alerts) with ``register_timeline_source`` from their ``AppConfig.ready()``.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import datetime

from django.core.exceptions import ValidationError
from django.db import models
from django.db.models import Case, F, Prefetch, Q, QuerySet, When

from labbook.instruments.models import Instrument, InstrumentEvent
from labbook.instruments.queries import events_between
from labbook.logbook.models import Note, Session
from labbook.samples import queries as sample_queries
from labbook.samples.models import Location, Preparation, PreparationStep, Transfer
from labbook.tips import queries as tip_queries
from labbook.tips.models import Conditioning, Tip

DEFAULT_LIMIT = 100


# --- sessions and notes ---------------------------------------------------------------------


def sessions(
    *, instrument: Instrument | None = None, operator=None, open: bool | None = None
) -> QuerySet[Session]:
    """Sessions newest first, with instrument and operator."""
    found = Session.objects.filter(retired_at__isnull=True).select_related("instrument", "operator")
    if instrument is not None:
        found = found.filter(instrument=instrument)
    if operator is not None:
        found = found.filter(operator=operator)
    if open is not None:
        found = found.filter(end__isnull=open)
    return found.order_by("-start", "-pk")


def overlapping_sessions(
    *, instrument: Instrument, operator, start: datetime, end: datetime | None
) -> QuerySet[Session]:
    """Sessions of ``operator`` on ``instrument`` that share an instant with [start, end)."""
    found = sessions(instrument=instrument, operator=operator).filter(
        Q(end__isnull=True) | Q(end__gt=start)
    )
    if end is not None:
        found = found.filter(start__lt=end)
    return found


def open_session(instrument: Instrument, operator) -> Session | None:
    return sessions(instrument=instrument, operator=operator, open=True).first()


def session_at(instrument: Instrument, at: datetime) -> Session | None:
    """The session under way on ``instrument`` at ``at`` (the latest started, if several)."""
    return (
        sessions(instrument=instrument)
        .filter(start__lte=at)
        .filter(Q(end__isnull=True) | Q(end__gt=at))
        .first()
    )


def notes(
    *,
    instrument: Instrument | None = None,
    session: Session | None = None,
    sample=None,
    tip: Tip | None = None,
    q: str | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
) -> QuerySet[Note]:
    """Notes newest first, filtered; ``q`` is case-insensitive text in the note.

    A plain ``icontains`` (LIKE) scan, fine for a lab's notes; a PostgreSQL full-text index
    (SearchVector + GIN) is the step to take if they grow to millions.
    """
    found = Note.objects.filter(retired_at__isnull=True).select_related(
        "author", "instrument", "session", "sample", "tip"
    )
    if instrument is not None:
        found = found.filter(instrument=instrument)
    if session is not None:
        found = found.filter(session=session)
    if sample is not None:
        found = found.filter(sample=sample)
    if tip is not None:
        found = found.filter(tip=tip)
    if q:
        found = found.filter(text__icontains=q)
    if since is not None:
        found = found.filter(at__gte=since)
    if until is not None:
        found = found.filter(at__lte=until)
    return found.order_by("-at", "-pk")


def note_instrument(
    *, at: datetime, session: Session | None = None, sample=None, tip: Tip | None = None
) -> Instrument | None:
    """Whose logbook a note belongs to when the writer did not say: the session's instrument,
    else the instrument the tip was mounted in at ``at``, else where the sample was then."""
    if session is not None:
        return session.instrument
    if tip is not None:
        mount = tip_queries.mount_of(tip, at)
        if mount is not None:
            return mount.instrument
    if sample is not None:
        where = sample_queries.location_at(sample, at)
        if where is not None and where.instrument_id is not None:
            return where.instrument
    return None


# --- the timeline ---------------------------------------------------------------------------


@dataclass(frozen=True)
class TimelineEntry:
    """One line of an instrument's logbook: when, what kind, a title, details, and the record
    it comes from (a session's start and end are two entries of one record)."""

    at: datetime
    kind: str
    title: str
    detail: str
    record: models.Model

    @property
    def record_type(self) -> str:
        return f"{self.record._meta.app_label}.{self.record._meta.model_name}"


TimelineSource = Callable[..., Iterable[TimelineEntry]]


@dataclass(frozen=True)
class _Registered:
    source: TimelineSource
    takes_q: bool
    takes_limit: bool


_sources: dict[str, _Registered] = {}


def register_timeline_source(kind: str, source: TimelineSource) -> None:
    """Add a kind of entry to every instrument's logbook.

    ``source(instrument, since, until)`` returns the entries of ``kind`` whose time lies in
    [since, until] (``None`` = unbounded), in any order, in a fixed number of queries. It may
    also take the keywords ``q`` (search its records' own text in the database) and ``limit``
    (return at least the ``limit`` newest entries, not necessarily more); a source that takes
    neither is still right, only slower, because the composer filters by text and cuts to
    the page itself.
    """
    parameters = inspect.signature(source).parameters
    anything = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in parameters.values())
    _sources[kind] = _Registered(
        source=source,
        takes_q=anything or "q" in parameters,
        takes_limit=anything or "limit" in parameters,
    )


def timeline_kinds() -> list[str]:
    return list(_sources)


def _newest_first(entry: TimelineEntry):
    return (entry.at, entry.kind, entry.record.pk or 0)


def _inside(at: datetime, since: datetime | None, until: datetime | None) -> bool:
    return (since is None or at >= since) and (until is None or at <= until)


def _mentions(entry: TimelineEntry, needle: str) -> bool:
    return needle in entry.title.casefold() or needle in entry.detail.casefold()


def timeline(
    instrument: Instrument,
    since: datetime | None = None,
    until: datetime | None = None,
    kinds: Iterable[str] | None = None,
    q: str | None = None,
    limit: int | None = DEFAULT_LIMIT,
    offset: int = 0,
) -> list[TimelineEntry]:
    """The instrument's logbook between ``since`` and ``until``, newest first: entries of
    ``kinds`` (all by default) that mention ``q``, ``limit`` of them from ``offset``.

    Each source runs a fixed number of queries (one or two), whatever the number of entries;
    each is asked only for the ``offset + limit`` newest of its own.
    """
    kinds = list(kinds) if kinds else None
    unknown = sorted(set(kinds or ()) - set(_sources))
    if unknown:
        raise ValidationError(
            {"kind": f"unknown kind {', '.join(unknown)}; one of {', '.join(_sources)}"}
        )
    q = (q or "").strip() or None
    wanted = offset + limit if limit is not None else None
    entries: list[TimelineEntry] = []
    for kind, registered in _sources.items():
        if kinds is not None and kind not in kinds:
            continue
        hints = {}
        if registered.takes_q:
            hints["q"] = q
        if registered.takes_limit:
            hints["limit"] = wanted
        needle = q.casefold() if q and not registered.takes_q else None
        for entry in registered.source(instrument, since, until, **hints):
            if _inside(entry.at, since, until) and (needle is None or _mentions(entry, needle)):
                entries.append(entry)
    entries.sort(key=_newest_first, reverse=True)
    return entries[offset : None if limit is None else offset + limit]


# --- windows over the sources' tables -------------------------------------------------------


def _within(field: str, since: datetime | None, until: datetime | None) -> Q:
    inside = Q(**{f"{field}__isnull": False})
    if since is not None:
        inside &= Q(**{f"{field}__gte": since})
    if until is not None:
        inside &= Q(**{f"{field}__lte": until})
    return inside


def _instants(
    records: QuerySet, field: str, since: datetime | None, until: datetime | None, limit
) -> QuerySet:
    """Records with one entry, at ``field``: those inside the window, newest first."""
    records = records.filter(_within(field, since, until)).order_by(f"-{field}", "-pk")
    return records if limit is None else records[:limit]


def _periods(
    records: QuerySet,
    since: datetime | None,
    until: datetime | None,
    limit,
    *,
    start: str = "start",
    end: str = "end",
) -> QuerySet:
    """Records with an entry at their start and one at their end, with either inside the window.

    Ordered by the later of their entries inside the window, so the first ``limit`` records
    hold the ``limit`` newest entries: each record not among them has all its entries older.
    """
    start_inside, end_inside = _within(start, since, until), _within(end, since, until)
    records = records.filter(start_inside | end_inside)
    if limit is None:
        return records
    latest = Case(When(end_inside, then=F(end)), default=F(start))
    return records.annotate(_latest_inside=latest).order_by("-_latest_inside", "-pk")[:limit]


def _labels_matching(choices: type[models.TextChoices], q: str) -> list[str]:
    needle = q.casefold()
    return [value for value, label in choices.choices if needle in str(label).casefold()]


def _period_entries(
    record, kind: str, since, until, *, start: tuple[datetime, str, str], end
) -> list[TimelineEntry]:
    entries = []
    for at, title, detail in (start, end):
        if at is not None and _inside(at, since, until):
            entries.append(TimelineEntry(at, kind, title, detail, record))
    return entries


def _joined(*parts: str) -> str:
    return " — ".join(part for part in parts if part)


# --- the built-in sources -------------------------------------------------------------------


def session_entries(instrument, since, until, *, q=None, limit=None) -> list[TimelineEntry]:
    found = sessions(instrument=instrument)
    if q:
        found = found.filter(
            Q(goal__icontains=q) | Q(summary__icontains=q) | Q(operator__username__icontains=q)
        )
    entries = []
    for session in _periods(found, since, until, limit):
        who = session.operator.get_username()
        entries += _period_entries(
            session,
            "session",
            since,
            until,
            start=(session.start, f"Session started by {who}", session.goal),
            end=(session.end, f"Session ended ({who})", session.summary),
        )
    return entries


def note_entries(instrument, since, until, *, q=None, limit=None) -> list[TimelineEntry]:
    found = notes(instrument=instrument)
    if q:
        found = found.filter(
            Q(text__icontains=q)
            | Q(author__username__icontains=q)
            | Q(tip__name__icontains=q)
            | Q(sample__name__icontains=q)
        )
    entries = []
    for note in _instants(found, "at", since, until, limit):
        title = f"Note by {note.author.get_username()}"
        if note.tip_id is not None:
            title += f" on tip {note.tip}"
        elif note.sample_id is not None:
            title += f" on sample {note.sample}"
        entries.append(TimelineEntry(note.at, "note", title, note.text, note))
    return entries


def _step_words(step: PreparationStep) -> str:
    what = step.material or step.gas or step.description
    return f"{step.kind} {what}".strip()


def preparation_entries(instrument, since, until, *, q=None, limit=None) -> list[TimelineEntry]:
    # samples.queries has no per-instrument query, so this reads samples.models directly
    # (read-only, the documented fields of a preparation and its steps).
    found = Preparation.objects.filter(
        instrument=instrument, retired_at__isnull=True
    ).select_related("sample", "recipe")
    if q:
        steps = PreparationStep.objects.filter(
            Q(kind__icontains=q)
            | Q(material__icontains=q)
            | Q(gas__icontains=q)
            | Q(description__icontains=q)
        )
        found = found.filter(
            Q(sample__name__icontains=q)
            | Q(sample__substrate__icontains=q)
            | Q(recipe__name__icontains=q)
            | Q(notes__icontains=q)
            | Q(pk__in=steps.values("preparation_id"))
        )
    found = _instants(found, "started_at", since, until, limit).prefetch_related(
        Prefetch("steps", queryset=PreparationStep.objects.order_by("position"))
    )
    entries = []
    for preparation in found:
        title = f"Preparation of {preparation.sample}"
        if preparation.recipe is not None:
            title += f" ({preparation.recipe})"
        steps = ", ".join(_step_words(step) for step in preparation.steps.all())
        entries.append(
            TimelineEntry(
                preparation.started_at,
                "preparation",
                title,
                _joined(steps, preparation.notes),
                preparation,
            )
        )
    return entries


def transfer_entries(instrument, since, until, *, q=None, limit=None) -> list[TimelineEntry]:
    # As for preparations: read from samples.models, since samples.queries has no such query.
    found = Transfer.objects.filter(instrument=instrument, retired_at__isnull=True).select_related(
        "sample"
    )
    if q:
        found = found.filter(
            Q(sample__name__icontains=q)
            | Q(notes__icontains=q)
            | Q(location__in=_labels_matching(Location, q))
        )
    return [
        TimelineEntry(
            transfer.at,
            "sample_transfer",
            f"{transfer.sample} moved to the {transfer.get_location_display()}",
            transfer.notes,
            transfer,
        )
        for transfer in _instants(found, "at", since, until, limit)
    ]


def tip_mount_entries(instrument, since, until, *, q=None, limit=None) -> list[TimelineEntry]:
    found = tip_queries.mounts_on(instrument)
    if q:
        found = found.filter(
            Q(tip__name__icontains=q) | Q(tip__material__icontains=q) | Q(notes__icontains=q)
        )
    entries = []
    for mount in _periods(found, since, until, limit):
        tip = mount.tip
        about = _joined(f"{tip.material}, {tip.get_origin_display()}", mount.notes)
        entries += _period_entries(
            mount,
            "tip_mount",
            since,
            until,
            start=(mount.start, f"Tip {tip} mounted", about),
            end=(mount.end, f"Tip {tip} taken out", about),
        )
    return entries


def _params_words(params: dict) -> str:
    # Sorted: PostgreSQL's jsonb does not keep the order the keys were sent in.
    return ", ".join(f"{key}={params[key]}" for key in sorted(params))


def conditioning_entries(instrument, since, until, *, q=None, limit=None) -> list[TimelineEntry]:
    found = tip_queries.conditioning_on(instrument)
    if q:
        found = found.filter(
            Q(tip__name__icontains=q)
            | Q(outcome__icontains=q)
            | Q(params__species__icontains=q)
            | Q(kind__in=_labels_matching(Conditioning.Kind, q))
        )
    entries = []
    for event in _instants(found, "at", since, until, limit):
        title = f"{event.get_kind_display().capitalize()} on tip {event.tip}"
        detail = _joined(_params_words(event.params), event.outcome)
        entries.append(TimelineEntry(event.at, "conditioning", title, detail, event))
    return entries


def instrument_event_entries(
    instrument, since, until, *, q=None, limit=None
) -> list[TimelineEntry]:
    found = events_between(instrument, since, until)
    if q:
        found = found.filter(
            Q(summary__icontains=q) | Q(kind__in=_labels_matching(InstrumentEvent.Kind, q))
        )
    entries = []
    for event in _periods(found, since, until, limit):
        what = event.get_kind_display().capitalize()
        entries += _period_entries(
            event,
            "instrument_event",
            since,
            until,
            start=(event.start, f"{what} started", event.summary),
            end=(event.end, f"{what} ended", event.summary),
        )
    return entries


register_timeline_source("session", session_entries)
register_timeline_source("note", note_entries)
register_timeline_source("preparation", preparation_entries)
register_timeline_source("sample_transfer", transfer_entries)
register_timeline_source("tip_mount", tip_mount_entries)
register_timeline_source("conditioning", conditioning_entries)
register_timeline_source("instrument_event", instrument_event_entries)
