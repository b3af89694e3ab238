"""Every state change of sessions and notes: the one path views, API, tasks and commands call.

Decisions:

* **One open session per operator and instrument.** Starting a second one is refused, naming
  the open session, rather than closing it: a session left open overnight did not last all
  night, and closing it at the new start would log hours that never happened. Sessions of one
  operator on one instrument never overlap (a paper logbook page cannot be in two places);
  two operators may work on one instrument at the same time.
* **Every note belongs to an instrument's logbook.** When it is not given it comes from the
  session, else from the tip's mount at the note's time, else from where the sample was then;
  a note with none of these needs the instrument named.
"""

from __future__ import annotations

from datetime import UTC, datetime

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone

from labbook.accounts.permissions import is_lab_member, require_member
from labbook.core.records import save_record
from labbook.instruments.models import Instrument
from labbook.logbook import queries
from labbook.logbook.models import Note, Session


def _when(at: datetime) -> str:
    return f"{at.astimezone(UTC):%Y-%m-%d %H:%M} UTC"


def describe_session(session: Session) -> str:
    until = "still open" if session.end is None else f"until {_when(session.end)}"
    return (
        f"session #{session.pk} of {session.operator} on {session.instrument} "
        f"from {_when(session.start)}, {until}"
    )


@transaction.atomic
def start_session(
    instrument: Instrument,
    *,
    start: datetime | None = None,
    end: datetime | None = None,
    goal: str = "",
    operator=None,
    actor,
) -> Session:
    """Open a session (or log a past one, with ``end``) of ``operator`` (the actor by default).

    Refused when it overlaps a session of the same operator on the same instrument (module
    docstring): end the open one first.
    """
    require_member(actor)
    operator = operator or actor
    if not is_lab_member(operator):
        raise ValidationError({"operator": "the operator must be a member of the lab"})
    start = start or timezone.now()
    if end is not None and end <= start:
        raise ValidationError({"end": "a session ends after it starts"})
    clashing = queries.overlapping_sessions(
        instrument=instrument, operator=operator, start=start, end=end
    ).first()
    if clashing is not None:
        hint = "; end it first" if clashing.end is None else ""
        raise ValidationError({"start": f"overlaps {describe_session(clashing)}{hint}"})
    session = Session(instrument=instrument, operator=operator, start=start, end=end, goal=goal)
    return save_record(session, actor)


@transaction.atomic
def end_session(
    session: Session, *, end: datetime | None = None, summary: str | None = None, actor
) -> Session:
    """Close an open session at ``end`` (now by default), with what came of it."""
    require_member(actor)
    session = (
        Session.objects.select_for_update()
        .select_related("instrument", "operator")
        .get(pk=session.pk)
    )
    end = end or timezone.now()
    if session.end is not None:
        raise ValidationError({"end": f"{describe_session(session)}: it has already ended"})
    if end <= session.start:
        raise ValidationError({"end": f"a session ends after it starts ({_when(session.start)})"})
    session.end = end
    if summary is not None:
        session.summary = summary
    return save_record(session, actor)


@transaction.atomic
def write_note(
    *,
    text: str,
    at: datetime | None = None,
    instrument: Instrument | None = None,
    session: Session | None = None,
    sample=None,
    tip=None,
    actor,
) -> Note:
    """Add a note to an instrument's logbook. The text is kept exactly as typed (Markdown
    source); escaping is the page's job, at rendering."""
    require_member(actor)
    if not text or not text.strip():
        raise ValidationError({"text": "a note needs some text"})
    if sample is not None and tip is not None:
        raise ValidationError({"tip": "a note is about one record: give a sample or a tip"})
    at = at or timezone.now()
    if session is not None and instrument is not None and session.instrument_id != instrument.pk:
        raise ValidationError(
            {"instrument": f"session #{session.pk} is on {session.instrument}, not {instrument}"}
        )
    instrument = instrument or queries.note_instrument(
        at=at, session=session, sample=sample, tip=tip
    )
    if instrument is None:
        raise ValidationError(
            {"instrument": "say whose logbook this note belongs to: give the instrument"}
        )
    note = Note(
        at=at,
        text=text,
        author=actor,
        instrument=instrument,
        session=session,
        sample=sample,
        tip=tip,
    )
    return save_record(note, actor)
