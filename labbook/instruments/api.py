from __future__ import annotations

from django.shortcuts import get_object_or_404
from ninja import Router, Schema, Status
from pydantic import Field

from labbook.instruments import actions
from labbook.instruments.models import Chamber, Channel, Instrument
from labbook.instruments.queries import instruments_for

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


class ChannelIn(Schema):
    instrument: int
    chamber: int | None = None
    name: str = Field(min_length=1, max_length=100)
    quantity: Channel.Quantity
    unit: str = Field(min_length=1, max_length=30)
    location: str = ""
    gas: str = ""


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
