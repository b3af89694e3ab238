"""The JSON API router of tips: tips, their mounting periods, conditioning events, the tip state
of an instrument at a time, and the datasets a tip produced.

Ending a mount is ``POST /tips/{id}/mounts/{mount_id}/end`` (an action on the record, like
ending a session), not a PATCH: the end is the only thing that changes and it is set once.
Tips belong to no instrument, so an instrument-scoped token cannot create them; it can mount
tips in and condition tips on its own instrument.
"""

# No "from __future__ import annotations" here: ninja reads the views' parameter types at
# import time, and @paginate's wrapper would resolve string annotations in its own module.

from datetime import datetime

from django.db.models import Q
from django.shortcuts import get_object_or_404
from django.utils import timezone
from ninja import Query, Router, Status
from ninja.pagination import LimitOffsetPagination, paginate

from labbook.instruments.models import Instrument
from labbook.tips import actions, queries
from labbook.tips.models import Tip, TipMount
from labbook.tips.schemas import (
    AwareTime,
    ConditioningIn,
    ConditioningOut,
    InstrumentTipOut,
    MountCreatedOut,
    MountEndIn,
    MountIn,
    MountOut,
    TipDetailOut,
    TipFileOut,
    TipFilters,
    TipIn,
    TipListOut,
)

router = Router(tags=["tips"])

MAX_PAGE = 500


def _state_answer(state: queries.TipState | None, at: datetime):
    if state is None:  # no tip in the scanner then
        return {"at": at, "tip": None, "mount": None, "events": [], "apex_species": None}
    return state


@router.get("/tips", response=list[TipListOut])
@paginate(LimitOffsetPagination, max_limit=MAX_PAGE)
def list_tips(request, filters: Query[TipFilters]):
    """Tips in use, by name, each with the mount it is in now (if any)."""
    found = queries.tips_with_current_mount()
    if filters.material:
        found = found.filter(material__iexact=filters.material)
    if filters.origin:
        found = found.filter(origin=filters.origin)
    if filters.q:
        found = found.filter(Q(name__icontains=filters.q) | Q(identifier__icontains=filters.q))
    return found.order_by("name")


@router.post("/tips", response={201: TipListOut})
def create_tip(request, payload: TipIn):
    request.auth.require_write()
    tip = actions.create_tip(**payload.dict(), actor=request.auth.user)
    tip.current_mounts = []
    return Status(201, tip)


@router.get("/tips/{tip_id}", response=TipDetailOut)
def get_tip(request, tip_id: int):
    """One tip with its current mount and its state now (conditioning since the mount)."""
    tip = get_object_or_404(Tip, pk=tip_id)
    state = queries.tip_state(tip)
    tip.current_mount, tip.state = state.mount, state
    return tip


@router.post("/tips/{tip_id}/mounts", response={201: MountCreatedOut})
def mount_tip(request, tip_id: int, payload: MountIn):
    """Mount the tip in an instrument's scanner. Overlapping another mount of the instrument or
    of the tip is refused (422, naming it); with ``close_previous`` (default) the instrument's
    open mount of another tip ends at this start."""
    request.auth.require_write(instrument_id=payload.instrument)
    tip = get_object_or_404(Tip, pk=tip_id)
    instrument = get_object_or_404(Instrument, pk=payload.instrument)
    mounted = actions.mount_tip(
        tip,
        instrument,
        start=payload.start or timezone.now(),
        end=payload.end,
        close_previous=payload.close_previous,
        notes=payload.notes,
        actor=request.auth.user,
    )
    mount = mounted.mount
    mount.closed_previous = mounted.closed_previous
    return Status(201, mount)


@router.post("/tips/{tip_id}/mounts/{mount_id}/end", response=MountOut)
def end_mount(request, tip_id: int, mount_id: int, payload: MountEndIn):
    """The tip came out of the scanner (at ``end``, now by default)."""
    mount = get_object_or_404(TipMount, pk=mount_id, tip_id=tip_id)
    request.auth.require_write(instrument_id=mount.instrument_id)
    return actions.unmount_tip(mount, end=payload.end, actor=request.auth.user)


@router.post("/tips/{tip_id}/conditioning", response={201: ConditioningOut})
def record_conditioning(request, tip_id: int, payload: ConditioningIn):
    """Log a conditioning event. Its instrument is the one the tip was mounted in at ``at``;
    give ``instrument`` only for a tip that was in no scanner then (e.g. annealed in the
    preparation chamber). A parameter in a wrong unit is a 422 naming ``params.<key>``."""
    tip = get_object_or_404(Tip, pk=tip_id)
    at = payload.at or timezone.now()
    mount = queries.mount_of(tip, at)
    instrument_id = payload.instrument or (mount.instrument_id if mount else None)
    request.auth.require_write(instrument_id=instrument_id)
    instrument = None
    if payload.instrument is not None:
        instrument = get_object_or_404(Instrument, pk=payload.instrument)
    event = actions.record_conditioning(
        tip,
        kind=payload.kind,
        at=at,
        params=payload.params,
        outcome=payload.outcome,
        instrument=instrument,
        actor=request.auth.user,
    )
    return Status(201, event)


@router.get("/tips/{tip_id}/files", response=list[TipFileOut])
@paginate(LimitOffsetPagination, max_limit=MAX_PAGE)
def tip_files(request, tip_id: int):
    """The datasets this tip produced, newest first."""
    from labbook.datafiles.queries import files_of_tip

    return files_of_tip(get_object_or_404(Tip, pk=tip_id))


@router.get("/instruments/{instrument_id}/tip", response=InstrumentTipOut)
def instrument_tip(request, instrument_id: int, at: AwareTime | None = None):
    """The tip in the instrument's scanner at ``at`` (now by default) and its state: the
    conditioning since it was mounted. ``tip`` and ``mount`` are null when none was mounted."""
    instrument = get_object_or_404(Instrument, pk=instrument_id)
    at = at or timezone.now()
    return _state_answer(queries.tip_state(instrument, at), at)
