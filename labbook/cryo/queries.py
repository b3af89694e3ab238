"""Read-side queries of cryostats, refills, boil-off forecasts, refill plans and alerts; other apps
read through these.

Every number comes from ``labbook.science.cryogen``: this module only fetches the readings and
the logged refills, turns them into arrays and dataclasses, and hands them over.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta

import numpy as np
from django.conf import settings
from django.core.cache import cache
from django.db.models import Count, Max, QuerySet

from labbook.cryo.models import Alert, Cryostat, Holiday, LabCalendar, Refill
from labbook.instruments.models import InstrumentEvent, Reading
from labbook.science import cryogen as sc
from labbook.science.errors import ScienceInputError

#: How far back the boil-off is fitted: a few weeks hold a dozen refill cycles, enough for a
#: trailing median of the rate, and the forecast follows the bath as it is now.
ANALYSIS_WINDOW = timedelta(days=28)
#: A rise of this fraction of the capacity that stays up is a refill (noise is far smaller).
MIN_RISE_FRACTION = 0.1
#: A logged refill within this of a level jump is the same refill.
MERGE_WINDOW_S = 2 * 3600.0


class CryoDataError(ValueError):
    """A cryostat lacks the data a forecast needs; the message names what is missing."""


# --- configuration ----------------------------------------------------------------------------


def cryostats(*, include_retired: bool = False) -> QuerySet[Cryostat]:
    found = Cryostat.objects.select_related("instrument", "level_channel")
    if not include_retired:
        found = found.filter(retired_at__isnull=True)
    return found.order_by("instrument__name", "cryogen", "name")


def cryostats_of(instrument) -> QuerySet[Cryostat]:
    return cryostats().filter(instrument=instrument)


def lab_calendar() -> LabCalendar:
    """The lab's calendar: the first one configured, else the defaults (unsaved)."""
    found = LabCalendar.objects.filter(retired_at__isnull=True).order_by("pk").first()
    return found if found is not None else LabCalendar()


def science_calendar(calendar: LabCalendar | None = None) -> sc.LabCalendar:
    calendar = calendar or lab_calendar()
    holidays: frozenset[date] = frozenset()
    if calendar.pk is not None:
        holidays = frozenset(
            calendar.holidays.filter(retired_at__isnull=True).values_list("day", flat=True)
        )
    return sc.LabCalendar(
        tz=calendar.time_zone,
        working_days=tuple(sorted(int(d) for d in calendar.working_days)),
        day_start=calendar.day_start,
        day_end=calendar.day_end,
        holidays=holidays,
    )


def calibration_of(cryostat: Cryostat) -> sc.LevelCalibration:
    """Reading → litres: the stored table or line, else 0 L at 0 to the capacity at 100."""
    spec = cryostat.calibration or {}
    if spec.get("kind") == "table":
        return sc.LevelCalibration(points=tuple((float(r), float(v)) for r, v in spec["points"]))
    if spec.get("kind") == "linear":
        return sc.LevelCalibration.linear(
            float(spec["litres_at_zero"]),
            float(spec["litres_at_full"]),
            float(spec.get("full_reading", 100.0)),
        )
    return sc.LevelCalibration.linear(0.0, float(cryostat.capacity_l), 100.0)


# --- readings and refills ---------------------------------------------------------------------


def channel_arrays(
    channel_id: int, since: datetime, until: datetime
) -> tuple[np.ndarray, np.ndarray]:
    """(t in POSIX s, value) of one channel in [since, until], oldest first, as numpy arrays
    straight from ``values_list`` (no model instances: PERFORMANCE.md §6)."""
    rows = (
        Reading.objects.filter(channel_id=channel_id, t__gte=since, t__lte=until)
        .order_by("t")
        .values_list("t", "value")
    )
    rows = list(rows)
    t = np.fromiter((r[0].timestamp() for r in rows), dtype=np.float64, count=len(rows))
    v = np.fromiter((r[1] for r in rows), dtype=np.float64, count=len(rows))
    return t, v


def level_series(
    cryostat: Cryostat, since: datetime, until: datetime
) -> tuple[np.ndarray, np.ndarray]:
    """(t, litres) of the cryostat's level channel in [since, until]."""
    t, reading = channel_arrays(cryostat.level_channel_id, since, until)
    litres = np.asarray(calibration_of(cryostat).to_litres(reading), dtype=np.float64)
    return t, litres


@dataclass(frozen=True)
class LoggedRefill:
    """A refill as logged: a ``Refill`` row, or a cryogen-transfer event of the instrument
    that no ``Refill`` row stands for (logged on the instrument page or by the demo)."""

    at: datetime
    end: datetime | None
    taken_l: float | None
    transferred_l: float | None
    level_before_l: float | None
    level_after_l: float | None
    person: object | None
    source: str  # "refill" or "event"
    pk: int
    summary: str = ""


def _pct_to_l(cryostat: Cryostat, value) -> float | None:
    if not isinstance(value, int | float) or isinstance(value, bool):
        return None
    return float(calibration_of(cryostat).to_litres(float(value)))


def logged_refills(
    cryostat: Cryostat, since: datetime | None = None, until: datetime | None = None
) -> list[LoggedRefill]:
    """Every logged refill of the cryostat in [since, until], oldest first: its ``Refill``
    rows merged with the instrument's cryogen-transfer events of the same cryogen."""
    refills = Refill.objects.filter(cryostat=cryostat, retired_at__isnull=True)
    events = InstrumentEvent.objects.filter(
        instrument_id=cryostat.instrument_id,
        kind=InstrumentEvent.Kind.CRYOGEN_TRANSFER,
        retired_at__isnull=True,
        details__cryogen=cryostat.cryogen,
        cryo_refill__isnull=True,
    )
    if since is not None:
        refills, events = refills.filter(at__gte=since), events.filter(start__gte=since)
    if until is not None:
        refills, events = refills.filter(at__lte=until), events.filter(start__lte=until)
    found = [
        LoggedRefill(
            at=r.at,
            end=r.end,
            taken_l=r.taken_l,
            transferred_l=r.transferred_l,
            level_before_l=r.level_before_l,
            level_after_l=r.level_after_l,
            person=r.person,
            source="refill",
            pk=r.pk,
            summary=r.notes,
        )
        for r in refills.select_related("person")
    ]
    for e in events.select_related("recorded_by"):
        details = e.details if isinstance(e.details, dict) else {}
        before = _pct_to_l(cryostat, details.get("level_before_pct"))
        after = _pct_to_l(cryostat, details.get("level_after_pct"))
        taken = details.get("taken_l")
        found.append(
            LoggedRefill(
                at=e.start,
                end=e.end,
                taken_l=float(taken) if isinstance(taken, int | float) else None,
                transferred_l=(after - before)
                if before is not None and after is not None
                else None,
                level_before_l=before,
                level_after_l=after,
                person=e.recorded_by,
                source="event",
                pk=e.pk,
                summary=e.summary,
            )
        )
    return sorted(found, key=lambda r: r.at)


# --- analysis and forecast --------------------------------------------------------------------


@dataclass(frozen=True)
class CryostatAnalysis:
    cryostat: Cryostat
    since: datetime
    until: datetime
    t: np.ndarray
    level_l: np.ndarray
    analysis: sc.Analysis
    logged: list[LoggedRefill]
    last_reading_at: datetime

    @property
    def rates(self) -> np.ndarray:
        return np.array([s.rate_l_per_day for s in self.analysis.segments], dtype=np.float64)


def analysis_for(
    cryostat: Cryostat, now: datetime, *, window: timedelta = ANALYSIS_WINDOW
) -> CryostatAnalysis:
    """Refills found in the level readings of the last ``window`` before ``now`` (merged with
    the logged ones) and the robust boil-off fit between them."""
    since = now - window
    t, level = level_series(cryostat, since, now)
    channel = cryostat.level_channel
    if t.size == 0:
        raise CryoDataError(
            f"{cryostat}: no readings of {channel.name!r} in the {window.days} days before "
            f"{now:%Y-%m-%d %H:%M} UTC"
        )
    logged = logged_refills(cryostat, since, now)
    analysis = sc.analyse(
        t,
        level,
        min_rise_l=MIN_RISE_FRACTION * cryostat.capacity_l,
        logged_times=[r.at.timestamp() for r in logged],
    )
    return CryostatAnalysis(
        cryostat=cryostat,
        since=since,
        until=now,
        t=t,
        level_l=level,
        analysis=analysis,
        logged=logged,
        last_reading_at=datetime.fromtimestamp(float(t[-1]), UTC),
    )


@dataclass(frozen=True)
class CryostatForecast:
    cryostat: Cryostat
    at: datetime
    forecast: sc.Forecast
    analysis: CryostatAnalysis

    @property
    def level_l(self) -> float:
        return self.forecast.level_now_l


def _level_at(analysis: CryostatAnalysis, now: datetime) -> float:
    # The fit ends at the last reading; carry it on to ``now`` at the fitted rate, so a meter
    # read every half hour does not make the bath look fuller than it is.
    a = analysis.analysis
    days = max(now.timestamp() - a.t_now, 0.0) / 86400.0
    return max(a.level_now_l - a.rate_l_per_day * days, 0.0)


def forecast_for(
    cryostat: Cryostat,
    now: datetime,
    *,
    analysis: CryostatAnalysis | None = None,
    calendar: sc.LabCalendar | None = None,
) -> CryostatForecast:
    analysis = analysis or analysis_for(cryostat, now)
    a = analysis.analysis
    result = sc.forecast(
        name=cryostat.cryogen,
        level_now_l=_level_at(analysis, now),
        now=now,
        rate_l_per_day=a.rate_l_per_day,
        rate_uncertainty_l_per_day=a.rate_uncertainty_l_per_day,
        minimum_l=cryostat.minimum_l,
        calendar=calendar or science_calendar(),
    )
    return CryostatForecast(cryostat=cryostat, at=now, forecast=result, analysis=analysis)


def plan_input(cryostat: Cryostat, forecast: CryostatForecast) -> sc.CryostatPlanInput:
    f = forecast.forecast
    return sc.CryostatPlanInput(
        key=str(cryostat.pk),
        name=cryostat.cryogen,
        capacity_l=cryostat.capacity_l,
        minimum_l=cryostat.minimum_l,
        level_now_l=f.level_now_l,
        rate_l_per_day=f.rate_l_per_day,
        rate_uncertainty_l_per_day=f.rate_uncertainty_l_per_day,
        fill_to_l=cryostat.fill_to_l,
        loss_fraction=cryostat.loss_fraction,
        line_cooldown_l=cryostat.cooldown_l,
        price_per_l=cryostat.price_per_l,
        lead_time_working_days=cryostat.lead_time_working_days,
    )


@dataclass(frozen=True)
class LabPlan:
    """The refill plan of the lab's cryostats for ``weeks`` from ``now``; cryostats that could
    not be forecast are listed in ``skipped`` with the reason, never silently left out."""

    now: datetime
    weeks: int
    plan: sc.Plan
    cryostats: dict[str, Cryostat]
    forecasts: dict[str, CryostatForecast]
    skipped: list[tuple[Cryostat, str]] = field(default_factory=list)
    calendar: sc.LabCalendar | None = None

    @property
    def refills(self) -> list[sc.PlannedRefill]:
        return self.plan.refills

    def in_working_hours(self, refill: sc.PlannedRefill) -> bool:
        """False for a refill the calendar cannot fit (a long weekend the bath cannot bridge):
        someone must come in, and the page says so."""
        return self.calendar is None or self.calendar.is_working(refill.at)

    def order_by(self) -> dict[str, date]:
        """The earliest order-by date per cryogen."""
        found: dict[str, date] = {}
        for r in self.plan.refills:
            if r.cryogen not in found or r.order_by < found[r.cryogen]:
                found[r.cryogen] = r.order_by
        return found


MAX_WEEKS = 26


def lab_plan(now: datetime, weeks: int = 4, *, only: Cryostat | None = None) -> LabPlan:
    """Every refill of every cryostat of the lab for the next ``weeks`` (LN₂ before LHe on a
    day with both), planned together so they share the calendar; ``only`` keeps one
    cryostat's refills and totals."""
    if not 1 <= weeks <= MAX_WEEKS:
        raise ScienceInputError(f"weeks must be 1 to {MAX_WEEKS}, got {weeks}", argument="weeks")
    calendar = science_calendar()
    chosen = [only] if only is not None else list(cryostats())
    inputs, by_key, forecasts, skipped = [], {}, {}, []
    for cryostat in chosen:
        try:
            forecast = forecast_for(cryostat, now, calendar=calendar)
        except (CryoDataError, ScienceInputError) as exc:
            skipped.append((cryostat, str(exc)))
            continue
        key = str(cryostat.pk)
        inputs.append(plan_input(cryostat, forecast))
        by_key[key], forecasts[key] = cryostat, forecast
    try:
        plan = sc.plan_refills(inputs, now=now, weeks=weeks, calendar=calendar)
    except ScienceInputError:
        # One cryostat's settings must not hide every other cryostat's plan: find the ones
        # that cannot be planned, name them, and plan the rest.
        good = []
        for item in inputs:
            try:
                sc.plan_refills([item], now=now, weeks=weeks, calendar=calendar)
            except ScienceInputError as exc:
                skipped.append((by_key.pop(item.key), str(exc)))
                forecasts.pop(item.key)
            else:
                good.append(item)
        plan = sc.plan_refills(good, now=now, weeks=weeks, calendar=calendar)
    return LabPlan(
        now=now,
        weeks=weeks,
        plan=plan,
        cryostats=by_key,
        forecasts=forecasts,
        skipped=skipped,
        calendar=calendar,
    )


# --- helium recovery and oxygen ---------------------------------------------------------------


@dataclass(frozen=True)
class Recovery:
    since: datetime
    until: datetime
    gas_m3: float
    recovered_liquid_l: float
    drawn_liquid_l: float
    fraction: float | None


def helium_recovery(cryostat: Cryostat, since: datetime, until: datetime) -> Recovery | None:
    """Gas returned to the recovery line in [since, until] as liquid-equivalent litres, and the
    fraction of the liquid drawn from the supply dewars in that time it stands for. The flow
    meter is taken to read litres of gas per minute at the 15 °C reference (REFERENCES §1)."""
    if cryostat.cryogen != "LHe" or cryostat.recovery_flow_channel_id is None:
        return None
    t, flow_l_per_min = channel_arrays(cryostat.recovery_flow_channel_id, since, until)
    if t.size < 2:
        return None
    gas_m3 = float(np.trapezoid(flow_l_per_min, t / 60.0)) / 1000.0
    recovered = sc.recovered_liquid_equivalent_l(gas_m3)
    drawn = sum(r.taken_l or 0.0 for r in logged_refills(cryostat, since, until))
    fraction = sc.recovery_fraction(recovered, drawn) if drawn > 0 else None
    return Recovery(since, until, gas_m3, recovered, drawn, fraction)


def worst_case_oxygen(cryostat: Cryostat) -> float | None:
    """Room O₂ % if the whole transfer dewar evaporated into the closed room (FIELD.md §7)."""
    if not cryostat.room_volume_m3 or not cryostat.transfer_dewar_l:
        return None
    return float(
        sc.worst_case_oxygen_percent(
            cryostat.room_volume_m3, cryostat.transfer_dewar_l, cryostat.cryogen
        )
    )


# --- alerts -----------------------------------------------------------------------------------


def open_alerts(instrument=None) -> QuerySet[Alert]:
    found = Alert.objects.filter(state=Alert.State.OPEN).select_related(
        "cryostat", "cryostat__instrument"
    )
    if instrument is not None:
        found = found.filter(cryostat__instrument=instrument)
    return found.order_by("-opened_at")


def _panel_rows(chosen: list[Cryostat], now: datetime) -> dict[int, dict]:
    """Each cryostat's forecast level, next planned refill and why it has none, by pk."""
    plan = lab_plan(now, 2)
    skipped = {c.pk: reason for c, reason in plan.skipped}
    rows = {}
    for cryostat in chosen:
        fc = plan.forecasts.get(str(cryostat.pk))
        upcoming = [r for r in plan.refills if r.cryostat == str(cryostat.pk)]
        rows[cryostat.pk] = {
            "level_l": fc.level_l if fc else None,
            "next": upcoming[0] if upcoming else None,
            "error": skipped.get(cryostat.pk, ""),
        }
    return rows


def _plan_inputs_signature(chosen: list[Cryostat]) -> str:
    """What the plan depends on besides the level readings: the cryostats as configured, the
    logged refills (rows and cryogen-transfer events) and the calendar. A change to any of
    them makes a new plan at once."""
    refills = Refill.objects.aggregate(n=Count("pk"), last=Max("updated_at"))
    transfers = InstrumentEvent.objects.filter(
        kind=InstrumentEvent.Kind.CRYOGEN_TRANSFER
    ).aggregate(n=Count("pk"), last=Max("updated_at"))
    calendars = LabCalendar.objects.aggregate(n=Count("pk"), last=Max("updated_at"))
    holidays = Holiday.objects.aggregate(n=Count("pk"), last=Max("updated_at"))
    parts = [(c.pk, c.updated_at, c.level_channel_id) for c in chosen]
    text = repr((parts, refills, transfers, calendars, holidays))
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def dashboard_panel(now: datetime) -> dict:
    """For the dashboard: each cryostat's level and next planned refill, and the open alerts.

    The plan fits four weeks of level readings per cryostat (tens of milliseconds); the
    dashboard reuses one for ``LABBOOK_DASHBOARD_PLAN_SECONDS`` (``planned_at`` says when it
    was made), unless a cryostat, a logged refill or the calendar changed in between.
    """
    zone = lab_calendar().time_zone
    chosen = list(cryostats())
    if not chosen:
        return {"rows": [], "alerts": list(open_alerts()), "zone": zone, "planned_at": now}
    seconds = settings.LABBOOK_DASHBOARD_PLAN_SECONDS
    planned = None
    if seconds > 0:
        key = f"cryo.dashboard_plan.{_plan_inputs_signature(chosen)}"
        planned = cache.get(key)
    if planned is None:
        planned = {"at": now, "rows": _panel_rows(chosen, now)}
        if seconds > 0:
            cache.set(key, planned, seconds)
    rows = [
        {"cryostat": cryostat, **planned["rows"].get(cryostat.pk, _NOT_PLANNED)}
        for cryostat in chosen
    ]
    return {"rows": rows, "alerts": list(open_alerts()), "zone": zone, "planned_at": planned["at"]}


_NOT_PLANNED = {"level_l": None, "next": None, "error": ""}
