"""The JSON API router of cryostats, refills, boil-off forecasts, refill plans and alerts.

Cryostats are lab-wide setup: creating one needs a manager (DEVELOPERS.md, Permissions).
Logging a refill is a member's write on the cryostat's instrument, so an instrument-scoped
token can log the refills of its own instrument only. Forecasts and plans are computed from
the readings on every request (nothing typed, nothing stale).
"""

# No "from __future__ import annotations" here: ninja reads the views' parameter types at
# import time.

from datetime import timedelta

from django.shortcuts import get_object_or_404
from django.utils import timezone
from ninja import Router, Status
from ninja.errors import HttpError

from labbook.cryo import actions, queries
from labbook.cryo.models import Alert, Cryostat
from labbook.cryo.schemas import (
    AlertOut,
    CryostatIn,
    CryostatOut,
    ForecastOut,
    PlanOut,
    RecoveryOut,
    RefillIn,
    RefillOut,
)
from labbook.instruments.models import Channel, Instrument
from labbook.science.errors import ScienceInputError

router = Router(tags=["cryostats"])


def forecast_answer(fc: queries.CryostatForecast) -> dict:
    f = fc.forecast
    return {
        "cryostat": fc.cryostat.pk,
        "cryogen": fc.cryostat.cryogen,
        "at": fc.at,
        "level_l": f.level_now_l,
        "level_read_at": fc.analysis.last_reading_at,
        "rate_l_per_day": f.rate_l_per_day,
        "rate_uncertainty_l_per_day": f.rate_uncertainty_l_per_day,
        "heat_load_w": f.heat_load_w,
        "minimum_l": fc.cryostat.minimum_l,
        "minimum_at": f.minimum_at,
        "latest_safe_refill_at": f.latest_safe_refill_at,
        "recommended_refill_at": f.recommended_refill_at,
        "band": {
            "minimum_at_earliest": f.minimum_at_earliest,
            "minimum_at_latest": f.minimum_at_latest,
        },
        "warning": f.warning,
    }


def plan_answer(plan: queries.LabPlan) -> dict:
    return {
        "at": plan.now,
        "weeks": plan.weeks,
        "time_zone": queries.lab_calendar().time_zone,
        "refills": [
            {
                "cryostat": int(r.cryostat),
                "cryogen": r.cryogen,
                "at": r.at,
                "level_before_l": r.level_before_l,
                "amount_l": r.amount_l,
                "order_l": r.order_l,
                "order_by": r.order_by,
                "cost": r.cost,
                "in_working_hours": plan.in_working_hours(r),
            }
            for r in plan.refills
        ],
        "total_order_l": plan.plan.total_order_l,
        "cost": plan.plan.cost,
        "order_by": plan.order_by(),
        "skipped": [{"cryostat": c.pk, "reason": reason} for c, reason in plan.skipped],
    }


def _cryostat(cryostat_id: int) -> Cryostat:
    return get_object_or_404(queries.cryostats(), pk=cryostat_id)


def _channel(instrument: Instrument, channel_id: int | None, field: str) -> Channel | None:
    if channel_id is None:
        return None
    channel = Channel.objects.filter(pk=channel_id, retired_at__isnull=True).first()
    if channel is None:
        raise HttpError(422, f"{field}: there is no channel {channel_id}")
    return channel


@router.get("/cryostats", response=list[CryostatOut])
def list_cryostats(request):
    """The lab's cryostats, by instrument and cryogen."""
    return list(queries.cryostats())


@router.post("/cryostats", response={201: CryostatOut})
def create_cryostat(request, payload: CryostatIn):
    request.auth.require_manager()
    instrument = get_object_or_404(Instrument, pk=payload.instrument)
    values = payload.dict(
        exclude={"instrument", "level_channel", "recovery_flow_channel", "oxygen_channel"}
    )
    cryostat = actions.create_cryostat(
        instrument,
        level_channel=_channel(instrument, payload.level_channel, "level_channel"),
        recovery_flow_channel=_channel(
            instrument, payload.recovery_flow_channel, "recovery_flow_channel"
        ),
        oxygen_channel=_channel(instrument, payload.oxygen_channel, "oxygen_channel"),
        actor=request.auth.user,
        **values,
    )
    return Status(201, cryostat)


@router.get("/cryostats/plan", response=PlanOut)
def lab_plan(request, weeks: int = 4):
    """Every refill of every cryostat of the lab for the next ``weeks`` (1–26): the LN₂ shield
    before the LHe bath on a day with both, litres to transfer and to order with losses, the
    order-by date from the supplier's lead time, totals per cryogen and the cost."""
    return plan_answer(queries.lab_plan(timezone.now(), weeks))


@router.get("/cryostats/alerts", response=list[AlertOut])
def list_alerts(request, state: str = "open"):
    """Cryogen alerts, newest first (``state``: open, acknowledged or all)."""
    found = Alert.objects.order_by("-opened_at")
    if state != "all":
        if state not in Alert.State.values:
            raise HttpError(422, "state: use open, acknowledged or all")
        found = found.filter(state=state)
    return list(found[:500])


@router.post("/cryostats/alerts/{alert_id}/acknowledge", response=AlertOut)
def acknowledge_alert(request, alert_id: int):
    alert = get_object_or_404(Alert.objects.select_related("cryostat"), pk=alert_id)
    request.auth.require_write(instrument_id=alert.cryostat.instrument_id)
    return actions.acknowledge_alert(alert, actor=request.auth.user)


@router.get("/cryostats/{cryostat_id}", response=CryostatOut)
def get_cryostat(request, cryostat_id: int):
    return _cryostat(cryostat_id)


@router.get("/cryostats/{cryostat_id}/forecast", response=ForecastOut)
def forecast(request, cryostat_id: int):
    """Level now, boil-off rate and its uncertainty, heat load, when the minimum is reached
    (with the band of rate ± 2σ), the latest safe refill and the recommended one: the last
    working slot that keeps the level above the minimum with margin until the next slot."""
    cryostat = _cryostat(cryostat_id)
    try:
        fc = queries.forecast_for(cryostat, timezone.now())
    except (queries.CryoDataError, ScienceInputError) as exc:
        # Too few readings to fit is the data's state, not a bad request.
        raise HttpError(409, str(exc)) from None
    return forecast_answer(fc)


@router.get("/cryostats/{cryostat_id}/plan", response=PlanOut)
def cryostat_plan(request, cryostat_id: int, weeks: int = 4):
    """This cryostat's refills for the next ``weeks`` (1–26)."""
    cryostat = _cryostat(cryostat_id)
    plan = queries.lab_plan(timezone.now(), weeks, only=cryostat)
    if plan.skipped:
        raise HttpError(409, plan.skipped[0][1])
    return plan_answer(plan)


@router.get("/cryostats/{cryostat_id}/refills", response=list[RefillOut])
def list_refills(request, cryostat_id: int):
    """Refills logged through this API or the planner page, newest first."""
    return list(_cryostat(cryostat_id).refills.filter(retired_at__isnull=True).order_by("-at"))


@router.post("/cryostats/{cryostat_id}/refills", response={201: RefillOut})
def log_refill(request, cryostat_id: int, payload: RefillIn):
    """Log a transfer: litres into the bath and/or drawn from the supply dewar (the loss is
    the difference), levels before and after. It also goes on the instrument's timeline."""
    cryostat = _cryostat(cryostat_id)
    request.auth.require_write(instrument_id=cryostat.instrument_id)
    refill = actions.record_refill(
        cryostat,
        **payload.dict(exclude={"at"}),
        at=payload.at or timezone.now(),
        actor=request.auth.user,
    )
    return Status(201, refill)


@router.get("/cryostats/{cryostat_id}/recovery", response=RecoveryOut | None)
def recovery(request, cryostat_id: int, days: int = 28):
    """Helium returned to the recovery line over the last ``days``: gas volume, its
    liquid-equivalent litres and the fraction of the liquid drawn it stands for. Null for a
    cryostat without a recovery-flow channel."""
    if not 1 <= days <= 366:
        raise HttpError(422, "days: 1 to 366")
    now = timezone.now()
    found = queries.helium_recovery(_cryostat(cryostat_id), now - timedelta(days=days), now)
    return None if found is None else found.__dict__
