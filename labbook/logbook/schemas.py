"""Request and answer shapes of the logbook API (DESIGN.md §4): sessions, notes and the
instrument's timeline. Times need a zone and are answered in UTC."""

from __future__ import annotations

from datetime import datetime

from ninja import Schema
from pydantic import Field

# One definition of "an aware time, stored in UTC" for the tips and logbook APIs.
from labbook.core.schemas import AwareTime


class SessionIn(Schema):
    instrument: int
    start: AwareTime | None = Field(None, description="default: now")
    end: AwareTime | None = Field(None, description="only to log a past session")
    goal: str = ""
    operator: int | None = Field(None, description="a lab member's id; default: the caller")


class SessionEndIn(Schema):
    end: AwareTime | None = Field(None, description="default: now")
    summary: str | None = Field(None, description="what came of it")


class SessionOut(Schema):
    id: int
    instrument: int = Field(alias="instrument_id")
    operator: int = Field(alias="operator_id")
    operator_username: str = Field(alias="operator.username")
    start: datetime
    end: datetime | None
    goal: str
    summary: str


class NoteIn(Schema):
    text: str = Field(min_length=1, max_length=100_000, description="Markdown, kept as typed")
    at: AwareTime | None = Field(None, description="default: now")
    session: int | None = None
    instrument: int | None = Field(
        None, description="default: the session's, the tip's mount's or the sample's place's"
    )
    sample: int | None = None
    tip: int | None = None


class NoteOut(Schema):
    id: int
    at: datetime
    text: str = Field(description="the Markdown source as typed; escape it when showing it")
    author: int = Field(alias="author_id")
    author_username: str = Field(alias="author.username")
    instrument: int = Field(alias="instrument_id")
    session: int | None = Field(None, alias="session_id")
    sample: int | None = Field(None, alias="sample_id")
    tip: int | None = Field(None, alias="tip_id")


class TimelineEntryOut(Schema):
    at: datetime
    kind: str
    title: str
    detail: str
    record_type: str = Field(description='the record it comes from, e.g. "logbook.session"')
    record_id: int = Field(alias="record.pk")


class TimelinePageOut(Schema):
    items: list[TimelineEntryOut]
    next_offset: int | None = Field(
        description="offset of the next page, null on the last one (the logbook is composed "
        "from several apps' records, so it is not counted)"
    )
