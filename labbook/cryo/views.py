"""The pages of cryostats: the lab's refill planner, one cryostat's page with its refill form,
the plan exports (CSV, iCalendar), the plot images and acknowledging an alert.

Views validate, call one query or action, and render. Times are shown in the lab calendar's
zone, named beside them; the exports carry UTC as well.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any
from urllib.parse import urlencode
from zoneinfo import ZoneInfo

from django import forms
from django.contrib import messages
from django.core.exceptions import ValidationError
from django.http import HttpRequest, HttpResponse, HttpResponseBadRequest
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.utils.cache import patch_cache_control
from django.views.decorators.http import require_GET, require_POST

from labbook.accounts.permissions import PermissionDenied, lab_member_required
from labbook.cryo import actions, exports, plots, queries
from labbook.cryo.models import Alert, Cryostat
from labbook.samples.forms import LabDateTimeField, lab_now_text
from labbook.science import cryogen as sc
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity
from labbook.web import plots as web_plots

DEFAULT_WEEKS = 4
WIDE = (760, 280)
NARROW = (350, 240)


def _zone() -> ZoneInfo:
    return ZoneInfo(queries.lab_calendar().time_zone)


def _weeks(request: HttpRequest) -> int:
    text = request.GET.get("weeks", "")
    try:
        weeks = int(text) if text else DEFAULT_WEEKS
    except ValueError:
        weeks = DEFAULT_WEEKS
    return min(max(weeks, 1), queries.MAX_WEEKS)


# --- forms ------------------------------------------------------------------------------------


def _litres_input(label: str, placeholder: str) -> forms.CharField:
    return forms.CharField(
        required=False,
        max_length=40,
        label=label,
        widget=forms.TextInput(attrs={"placeholder": placeholder, "autocomplete": "off"}),
    )


class RefillForm(forms.Form):
    """A transfer as the person who did it notes it: litres typed with a unit ("8 L")."""

    at = LabDateTimeField(label="Started", error_messages={"required": "give the start time"})
    taken = _litres_input("Taken from the supply dewar", "e.g. 10 L")
    transferred = _litres_input("Reached the bath", "e.g. 8 L")
    level_before = _litres_input("Level before", "e.g. 2.5 L")
    level_after = _litres_input("Level after", "e.g. 11 L")
    supply_dewar = forms.CharField(required=False, max_length=100, label="Supply dewar")
    notes = forms.CharField(required=False, widget=forms.Textarea(attrs={"rows": 2}))

    def clean(self) -> dict[str, Any]:
        data = super().clean()
        for name in ("taken", "transferred", "level_before", "level_after"):
            text = str(data.get(name) or "").strip()
            data[f"{name}_l"] = None
            if text:
                try:
                    data[f"{name}_l"] = parse_quantity(text, "liter", field=name)
                except ScienceInputError as exc:
                    self.add_error(name, str(exc).removeprefix(f"{name}: "))
        return data


_FORM_FIELD = {
    "taken_l": "taken",
    "transferred_l": "transferred",
    "level_before_l": "level_before",
    "level_after_l": "level_after",
}


# --- presenters -------------------------------------------------------------------------------


@dataclass
class CryostatCard:
    cryostat: Cryostat
    forecast: Any = None  # sc.Forecast
    level_read_at: Any = None
    error: str = ""
    refills: list = field(default_factory=list)  # planned refills of this cryostat
    alerts: list = field(default_factory=list)
    oxygen: float | None = None
    recovery: Any = None
    plot: dict = field(default_factory=dict)
    logged: list = field(default_factory=list)

    @property
    def heat_load_mw(self) -> float | None:
        return None if self.forecast is None else self.forecast.heat_load_w * 1000.0


def _plot_urls(cryostat: Cryostat) -> dict:
    def url(size, scale):
        query = {"w": size[0] * scale, "h": size[1] * scale}
        if scale != 1:
            query["scale"] = scale
        return f"{reverse('cryo:plot', args=[cryostat.pk])}?{urlencode(query)}"

    return {
        "wide": url(WIDE, 1),
        "wide_2x": url(WIDE, 2),
        "narrow": url(NARROW, 1),
        "narrow_2x": url(NARROW, 2),
        "wide_size": WIDE,
        "narrow_size": NARROW,
    }


def _cards(plan: queries.LabPlan, chosen: list[Cryostat], *, logged: bool = False) -> list:
    alerts: dict[int, list[Alert]] = {}
    for alert in queries.open_alerts():
        alerts.setdefault(alert.cryostat_id, []).append(alert)
    skipped = {c.pk: reason for c, reason in plan.skipped}
    cards = []
    for cryostat in chosen:
        key = str(cryostat.pk)
        fc = plan.forecasts.get(key)
        card = CryostatCard(
            cryostat=cryostat,
            forecast=fc.forecast if fc else None,
            level_read_at=fc.analysis.last_reading_at if fc else None,
            error=skipped.get(cryostat.pk, ""),
            refills=[r for r in plan.refills if r.cryostat == key],
            alerts=alerts.get(cryostat.pk, []),
            oxygen=queries.worst_case_oxygen(cryostat),
            plot=_plot_urls(cryostat) if fc else {},
        )
        if logged:
            since = plan.now - timedelta(days=28)
            card.logged = list(reversed(queries.logged_refills(cryostat, since, plan.now)))[:12]
            card.recovery = queries.helium_recovery(cryostat, since, plan.now)
        cards.append(card)
    return cards


def _plan_rows(plan: queries.LabPlan) -> list[dict]:
    today = plan.now.astimezone(ZoneInfo(queries.lab_calendar().time_zone)).date()
    return [
        {
            "refill": r,
            "cryostat": plan.cryostats[r.cryostat],
            "outside_hours": not plan.in_working_hours(r),
            "order_overdue": r.order_by < today,
        }
        for r in plan.refills
    ]


def _context(plan: queries.LabPlan, weeks: int, **extra: Any) -> dict:
    calendar = queries.lab_calendar()
    return {
        "plan": plan,
        "rows": _plan_rows(plan),
        "weeks": weeks,
        "week_choices": (1, 2, 4, 8, 12),
        "zone": calendar.time_zone,
        "calendar": calendar,
        "holidays": list(calendar.holidays.filter(day__gte=plan.now.date()).order_by("day")[:6])
        if calendar.pk
        else [],
        "order_by": sorted(plan.order_by().items()),
        "totals": sorted(plan.plan.total_order_l.items()),
        "oxygen_limit": sc.OXYGEN_DEFICIENT_PERCENT,
        "now": plan.now,
        **extra,
    }


# --- pages ------------------------------------------------------------------------------------


@lab_member_required
@require_GET
def planner(request: HttpRequest) -> HttpResponse:
    """The lab's refill planner: every cryostat's forecast and plot, the plan table."""
    weeks = _weeks(request)
    plan = queries.lab_plan(timezone.now(), weeks)
    chosen = list(queries.cryostats())
    return render(request, "cryo/planner.html", _context(plan, weeks, cards=_cards(plan, chosen)))


def _cryostat_page(request: HttpRequest, cryostat: Cryostat, form: RefillForm) -> HttpResponse:
    weeks = _weeks(request)
    plan = queries.lab_plan(timezone.now(), weeks, only=cryostat)
    card = _cards(plan, [cryostat], logged=True)[0]
    return render(
        request,
        "cryo/cryostat.html",
        _context(plan, weeks, card=card, cards=[card], cryostat=cryostat, form=form),
    )


@lab_member_required
@require_GET
def cryostat_detail(request: HttpRequest, pk: int) -> HttpResponse:
    cryostat = get_object_or_404(queries.cryostats(), pk=pk)
    return _cryostat_page(request, cryostat, RefillForm(initial={"at": lab_now_text()}))


@lab_member_required
@require_POST
def log_refill(request: HttpRequest, pk: int) -> HttpResponse:
    cryostat = get_object_or_404(queries.cryostats(), pk=pk)
    form = RefillForm(request.POST)
    if form.is_valid():
        data = form.cleaned_data
        try:
            actions.record_refill(
                cryostat,
                at=data["at"],
                taken_l=data["taken_l"],
                transferred_l=data["transferred_l"],
                level_before_l=data["level_before_l"],
                level_after_l=data["level_after_l"],
                supply_dewar=data["supply_dewar"].strip(),
                notes=data["notes"].strip(),
                actor=request.user,
            )
        except ValidationError as exc:
            for name, problems in getattr(exc, "error_dict", {"": exc.error_list}).items():
                target = _FORM_FIELD.get(name, name if name in form.fields else None)
                for problem in problems:
                    form.add_error(target, " ".join(problem.messages))
        else:
            messages.success(request, f"Refill of {cryostat.name} logged.")
            return redirect(reverse("cryo:cryostat", args=[cryostat.pk]))
    return _cryostat_page(request, cryostat, form)


@lab_member_required
@require_POST
def acknowledge(request: HttpRequest, pk: int) -> HttpResponse:
    alert = get_object_or_404(Alert, pk=pk)
    try:
        actions.acknowledge_alert(alert, actor=request.user)
    except ValidationError:
        messages.info(request, "That alert was already acknowledged.")
    except PermissionDenied as exc:
        messages.error(request, str(exc))
    else:
        messages.success(request, f"Alert acknowledged: {alert.get_kind_display()}.")
    back = request.POST.get("next", "")
    if not back.startswith("/") or back.startswith("//"):
        back = reverse("cryo:planner")
    return redirect(back)


@lab_member_required
@require_GET
def plot(request: HttpRequest, pk: int) -> HttpResponse:
    cryostat = get_object_or_404(queries.cryostats(), pk=pk)
    try:
        size = web_plots.PlotSize(
            int(request.GET.get("w", WIDE[0])),
            int(request.GET.get("h", WIDE[1])),
            int(request.GET.get("scale", 1)),
        )
    except (ValueError, web_plots.PlotRequestError) as exc:
        return HttpResponseBadRequest(str(exc), content_type="text/plain; charset=utf-8")
    plan = queries.lab_plan(timezone.now(), 1, only=cryostat)
    fc = plan.forecasts.get(str(cryostat.pk))
    if fc is None:
        return HttpResponse(
            plan.skipped[0][1], status=409, content_type="text/plain; charset=utf-8"
        )
    png = plots.cryostat_plot_png(fc, plan.refills, size, _zone())
    response = HttpResponse(png, content_type="image/png")
    patch_cache_control(response, private=True, max_age=300)
    return response


@lab_member_required
@require_GET
def plan_csv(request: HttpRequest) -> HttpResponse:
    plan = queries.lab_plan(timezone.now(), _weeks(request))
    response = HttpResponse(
        exports.plan_csv(plan, queries.lab_calendar().time_zone),
        content_type="text/csv; charset=utf-8",
    )
    response["Content-Disposition"] = 'attachment; filename="refill-plan.csv"'
    return response


@lab_member_required
@require_GET
def plan_ics(request: HttpRequest) -> HttpResponse:
    now = timezone.now()
    plan = queries.lab_plan(now, _weeks(request))
    body = exports.plan_ics(
        plan, queries.lab_calendar().time_zone, host=request.get_host() or "labbook", stamp=now
    )
    response = HttpResponse(body, content_type="text/calendar; charset=utf-8")
    response["Content-Disposition"] = 'attachment; filename="refill-plan.ics"'
    return response
