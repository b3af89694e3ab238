"""The JSON API router of the logbook: sessions, notes and the instrument's timeline.

Lists are paginated with ``limit`` and ``offset`` and answer ``{"items", "count"}``; the
timeline answers ``{"items", "next_offset"}`` instead (see ``TimelinePageOut``).
"""

# No "from __future__ import annotations" here: ninja reads the views' parameter types at
# import time, and @paginate's wrapper would resolve string annotations in its own module.

from django.contrib.auth import get_user_model
from django.shortcuts import get_object_or_404
from django.utils import timezone
from ninja import Field, Query, Router, Schema, Status
from ninja.pagination import LimitOffsetPagination, paginate

from labbook.core.schemas import AwareTime
from labbook.instruments.models import Instrument
from labbook.logbook import actions, queries
from labbook.logbook.models import Session
from labbook.logbook.schemas import (
    NoteIn,
    NoteOut,
    SessionEndIn,
    SessionIn,
    SessionOut,
    TimelinePageOut,
)
from labbook.samples.models import Sample
from labbook.tips.models import Tip

router = Router(tags=["logbook"])

MAX_PAGE = 500


@router.get("/sessions", response=list[SessionOut])
@paginate(LimitOffsetPagination, max_limit=MAX_PAGE)
def list_sessions(
    request, instrument: int | None = None, open: bool | None = None, operator: int | None = None
):
    """Sessions newest first; ``open=true`` for the ones still running."""
    found = queries.sessions(open=open)
    if instrument is not None:
        found = found.filter(instrument_id=instrument)
    if operator is not None:
        found = found.filter(operator_id=operator)
    return found


@router.post("/sessions", response={201: SessionOut})
def start_session(request, payload: SessionIn):
    """Open a session (or log a past one with ``end``). One open session per operator and
    instrument: a second is refused with 422 naming the open one — end it first."""
    request.auth.require_write(instrument_id=payload.instrument)
    instrument = get_object_or_404(Instrument, pk=payload.instrument)
    operator = None
    if payload.operator is not None:
        operator = get_object_or_404(get_user_model(), pk=payload.operator)
    session = actions.start_session(
        instrument,
        start=payload.start,
        end=payload.end,
        goal=payload.goal,
        operator=operator,
        actor=request.auth.user,
    )
    return Status(201, session)


@router.post("/sessions/{session_id}/end", response=SessionOut)
def end_session(request, session_id: int, payload: SessionEndIn):
    session = get_object_or_404(Session, pk=session_id)
    request.auth.require_write(instrument_id=session.instrument_id)
    return actions.end_session(
        session, end=payload.end, summary=payload.summary, actor=request.auth.user
    )


@router.post("/notes", response={201: NoteOut})
def write_note(request, payload: NoteIn):
    """Add a note. The text is stored exactly as sent and answered as JSON text; pages escape
    it when they show it. Without ``instrument`` the note goes to the session's instrument,
    else to the one the tip was mounted in, else to where the sample was at ``at``."""
    session = sample = tip = instrument = None
    if payload.session is not None:
        session = get_object_or_404(
            Session.objects.select_related("instrument"), pk=payload.session
        )
    if payload.sample is not None:
        sample = get_object_or_404(Sample, pk=payload.sample)
    if payload.tip is not None:
        tip = get_object_or_404(Tip, pk=payload.tip)
    if payload.instrument is not None:
        instrument = get_object_or_404(Instrument, pk=payload.instrument)
    at = payload.at or timezone.now()
    logbook = instrument or queries.note_instrument(at=at, session=session, sample=sample, tip=tip)
    request.auth.require_write(instrument_id=logbook.pk if logbook else None)
    note = actions.write_note(
        text=payload.text,
        at=at,
        instrument=instrument,
        session=session,
        sample=sample,
        tip=tip,
        actor=request.auth.user,
    )
    return Status(201, note)


@router.get("/notes", response=list[NoteOut])
@paginate(LimitOffsetPagination, max_limit=MAX_PAGE)
def list_notes(
    request,
    instrument: int | None = None,
    session: int | None = None,
    sample: int | None = None,
    tip: int | None = None,
    q: str | None = None,
    since: AwareTime | None = None,
    until: AwareTime | None = None,
):
    """Notes newest first; ``q`` finds text in them (case-insensitive)."""
    found = queries.notes(q=q, since=since, until=until)
    for name, value in (
        ("instrument_id", instrument),
        ("session_id", session),
        ("sample_id", sample),
        ("tip_id", tip),
    ):
        if value is not None:
            found = found.filter(**{name: value})
    return found


class TimelineQuery(Schema):
    since: AwareTime | None = None
    until: AwareTime | None = None
    kind: list[str] | None = Field(
        None, description="one or more kinds (repeat it, or separate with commas)"
    )
    q: str | None = Field(None, description="text in the entries' records")
    limit: int = Field(queries.DEFAULT_LIMIT, ge=1, le=MAX_PAGE)
    offset: int = Field(0, ge=0)


@router.get("/instruments/{instrument_id}/logbook", response=TimelinePageOut)
def instrument_logbook(request, instrument_id: int, filters: Query[TimelineQuery]):
    """The instrument's timeline, newest first: sessions, notes, preparations, sample
    transfers, tip mounts and conditioning, instrument events (and whatever other apps add).
    Kinds: see ``kind``; for deep paging, ``until`` the last entry's time works as a cursor."""
    instrument = get_object_or_404(Instrument, pk=instrument_id)
    kinds = [k.strip() for value in filters.kind or () for k in value.split(",") if k.strip()]
    entries = queries.timeline(
        instrument,
        since=filters.since,
        until=filters.until,
        kinds=kinds or None,
        q=filters.q,
        # One more than asked: whether it comes back says if there is a next page.
        limit=filters.limit + 1,
        offset=filters.offset,
    )
    more = len(entries) > filters.limit
    return {
        "items": entries[: filters.limit],
        "next_offset": filters.offset + filters.limit if more else None,
    }
