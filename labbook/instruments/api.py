from __future__ import annotations

import json
from datetime import datetime

from django.core.exceptions import RequestDataTooBig
from django.shortcuts import get_object_or_404
from django.utils import timezone
from ninja import Router, Schema, Status
from ninja.errors import HttpError
from pydantic import Field

from labbook.instruments import actions
from labbook.instruments.models import Chamber, Channel, Instrument
from labbook.instruments.queries import instruments_for, readings_between, state_at
from labbook.instruments.readings import MAX_BATCH, record_readings

router = Router(tags=["instruments"])


class ChamberOut(Schema):
    id: int
    name: str
    kind: str


class InstrumentOut(Schema):
    id: int
    name: str
    description: str
    time_zone: str
    chambers: list[ChamberOut]

    @staticmethod
    def resolve_chambers(obj: Instrument) -> list[Chamber]:
        return list(obj.chambers.all())


class InstrumentIn(Schema):
    name: str = Field(min_length=1, max_length=100)
    description: str = ""
    time_zone: str = "UTC"


class ChannelOut(Schema):
    id: int
    instrument: int = Field(alias="instrument_id")
    chamber: int | None = Field(None, alias="chamber_id")
    name: str
    quantity: str
    unit: str
    location: str
    gas: str
    expected_interval_s: float | None


class ChannelIn(Schema):
    instrument: int
    chamber: int | None = None
    name: str = Field(min_length=1, max_length=100)
    quantity: Channel.Quantity
    unit: str = Field(min_length=1, max_length=30)
    location: str = ""
    gas: str = ""
    expected_interval_s: float | None = Field(None, gt=0)


@router.get("/instruments", response=list[InstrumentOut])
def list_instruments(request):
    return instruments_for(request.auth.user).prefetch_related("chambers")


@router.post("/instruments", response={201: InstrumentOut})
def create_instrument(request, payload: InstrumentIn):
    request.auth.require_manager()
    instrument = actions.create_instrument(**payload.dict(), actor=request.auth.user)
    return Status(201, instrument)


@router.get("/instruments/{instrument_id}", response=InstrumentOut)
def get_instrument(request, instrument_id: int):
    return get_object_or_404(Instrument.objects.prefetch_related("chambers"), pk=instrument_id)


@router.get("/channels", response=list[ChannelOut])
def list_channels(request, instrument: int | None = None):
    channels = Channel.objects.filter(retired_at__isnull=True)
    if instrument is not None:
        channels = channels.filter(instrument_id=instrument)
    return channels.order_by("instrument_id", "name")


@router.post("/channels", response={201: ChannelOut})
def create_channel(request, payload: ChannelIn):
    request.auth.require_write(instrument_id=payload.instrument)
    instrument = get_object_or_404(Instrument, pk=payload.instrument)
    chamber = None
    if payload.chamber is not None:
        chamber = get_object_or_404(Chamber, pk=payload.chamber, instrument=instrument)
    data = payload.dict(exclude={"instrument", "chamber"})
    channel = actions.create_channel(instrument, chamber=chamber, **data, actor=request.auth.user)
    return Status(201, channel)


# --- readings ---------------------------------------------------------------------------------


class ReadingRejection(Schema):
    index: int
    error: str


class ReadingBatchOut(Schema):
    accepted: int
    inserted: int
    duplicates: int
    rejected: list[ReadingRejection]


READINGS_BODY_DOC = {
    "requestBody": {
        "content": {
            "application/json": {
                "schema": {
                    "type": "array",
                    "maxItems": MAX_BATCH,
                    "items": {
                        "type": "object",
                        "required": ["channel", "t", "value"],
                        "properties": {
                            "channel": {"type": "integer", "description": "channel id"},
                            "t": {"type": "string", "format": "date-time"},
                            "value": {
                                "oneOf": [{"type": "number"}, {"type": "string"}],
                                "description": "a number in the channel unit, or text with a unit",
                            },
                        },
                    },
                }
            }
        },
        "required": True,
    }
}


@router.post("/readings", response=ReadingBatchOut, openapi_extra=READINGS_BODY_DOC)
def post_readings(request):
    """Bulk readings ``[{channel, t, value}]``. Each bad row is rejected with its index and
    reason while the good rows are kept; the same channel and instant twice is stored once."""
    request.auth.require_write_any()
    try:
        body = request.body
    except RequestDataTooBig:
        raise HttpError(413, "the batch is too large: send fewer readings per request") from None
    try:
        rows = json.loads(body or b"null")
    except (ValueError, UnicodeDecodeError):
        raise HttpError(400, "the body is not JSON: send a list of {channel, t, value}") from None
    if not isinstance(rows, list):
        raise HttpError(422, "the body must be a JSON list of {channel, t, value}")
    try:
        result = record_readings(rows, access=request.auth)
    except ValueError as exc:
        raise HttpError(413, str(exc)) from exc
    return result.as_dict()


class ReadingOut(Schema):
    t: datetime
    value: float


class ChannelReadingsOut(Schema):
    channel: int
    unit: str
    since: datetime
    until: datetime
    readings: list[ReadingOut]


@router.get("/channels/{channel_id}/readings", response=ChannelReadingsOut)
def channel_readings(request, channel_id: int, since: datetime, until: datetime):
    """One channel's readings in [since, until] (at most 100 000; narrow the range for more)."""
    channel = get_object_or_404(Channel, pk=channel_id)
    since, until = _aware(since, "since"), _aware(until, "until")
    values = readings_between(channel, since, until, limit=100_000)
    return {
        "channel": channel.pk,
        "unit": channel.unit,
        "since": since,
        "until": until,
        "readings": [{"t": t, "value": v} for t, v in values],
    }


# --- state at an instant ----------------------------------------------------------------------


class VacuumRangeOut(Schema):
    name: str
    label: str
    convention: str


class ChannelStateOut(Schema):
    channel: int
    name: str
    quantity: str
    unit: str
    t: datetime | None
    value: float | None
    age_s: float | None
    flags: list[str]
    vacuum_range: VacuumRangeOut | None


class EventOut(Schema):
    id: int
    kind: str
    start: datetime
    end: datetime | None
    summary: str


class InstrumentStateOut(Schema):
    instrument: int
    at: datetime
    flags: list[str]
    channels: list[ChannelStateOut]
    events: list[EventOut]


def _aware(value: datetime, name: str) -> datetime:
    if value.tzinfo is None:
        raise HttpError(422, f"{name} has no time zone; add Z or an offset such as +01:00")
    return value


@router.get("/instruments/{instrument_id}/state", response=InstrumentStateOut)
def instrument_state(request, instrument_id: int, at: datetime | None = None):
    """The latest reading of every channel at or before ``at`` (default now), its age and
    flags (stale, pressure range per ISO 3529-1:2019, above UHV), and the instrument's flags
    (bake-out or cryogen transfer under way, within 2 h after a transfer)."""
    instrument = get_object_or_404(Instrument, pk=instrument_id)
    at = timezone.now() if at is None else _aware(at, "at")
    state = state_at(instrument, at)
    return {
        "instrument": instrument.pk,
        "at": state.at,
        "flags": list(state.flags),
        "channels": [
            {
                "channel": c.channel.pk,
                "name": c.channel.name,
                "quantity": c.channel.quantity,
                "unit": c.channel.unit,
                "t": c.t,
                "value": c.value,
                "age_s": None if c.age is None else c.age.total_seconds(),
                "flags": list(c.flags),
                "vacuum_range": None
                if c.vacuum_range is None
                else {
                    "name": c.vacuum_range.name,
                    "label": c.vacuum_range.label,
                    "convention": c.vacuum_range.convention,
                },
            }
            for c in state.channels
        ],
        "events": state.events,
    }
