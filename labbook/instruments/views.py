"""The pages of instruments: the list, one instrument's state (live or at an instant), its
channel plots, its events and the form that logs one, and the plot images themselves.

Views validate, call one query or action, and render. The presenters at the bottom turn the
query results into what the templates show (readable flags, event facts in trade units); the
plots are drawn by ``labbook.web.plots``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any
from urllib.parse import urlencode

from django import forms
from django.contrib import messages
from django.core.exceptions import ValidationError
from django.http import HttpRequest, HttpResponse, HttpResponseBadRequest
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.utils.cache import patch_cache_control
from django.views.decorators.http import require_GET, require_http_methods

from labbook.accounts.permissions import lab_member_required
from labbook.instruments import actions
from labbook.instruments.models import Chamber, Channel, Instrument, InstrumentEvent
from labbook.instruments.queries import (
    AFTER_TRANSFER_WINDOW,
    InstrumentState,
    channels_of,
    events_between,
    instruments_for,
    state_at,
)
from labbook.samples.forms import LabDateTimeField, lab_now_text, lab_zone
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity
from labbook.web import plots
from labbook.web.templatetags.labbook_format import format_age, format_quantity, formula

# --- forms ------------------------------------------------------------------------------------
# Kept with the views: these forms only read the page's inputs; record_event checks the event.

RANGES: dict[str, tuple[str, timedelta]] = {
    "1h": ("1 h", timedelta(hours=1)),
    "24h": ("24 h", timedelta(hours=24)),
    "7d": ("7 d", timedelta(days=7)),
    "30d": ("30 d", timedelta(days=30)),
    "1y": ("1 y", timedelta(days=365)),
}
DEFAULT_RANGE = "24h"


class StateAtForm(forms.Form):
    at = LabDateTimeField(required=False, label="State at")


class PlotRangeForm(forms.Form):
    """A preset window ending now, or since/until typed in the lab's zone."""

    range = forms.ChoiceField(choices=[(k, v[0]) for k, v in RANGES.items()], required=False)
    since = LabDateTimeField(required=False, label="From")
    until = LabDateTimeField(required=False, label="To")

    def clean(self) -> dict[str, Any]:
        data = super().clean()
        since, until = data.get("since"), data.get("until")
        if since is None and until is None:
            return data
        if since is None:
            self.add_error("since", "give the start of the window")
        elif until is not None and until <= since:
            self.add_error("until", "must be after the start")
        elif until is not None and until - since > plots.MAX_SPAN:
            self.add_error("until", f"a window spans at most {plots.MAX_SPAN.days} days")
        return data


ZONE_ROWS = 4
CRYOGENS = [("LHe", "liquid helium (LHe)"), ("LN2", "liquid nitrogen (LN₂)")]
# Event kinds in the order a lab logs them most often.
EVENT_KINDS = [
    InstrumentEvent.Kind.BAKEOUT,
    InstrumentEvent.Kind.CRYOGEN_TRANSFER,
    InstrumentEvent.Kind.VENT,
    InstrumentEvent.Kind.MAINTENANCE,
    InstrumentEvent.Kind.PUMP_FAILURE,
    InstrumentEvent.Kind.OTHER,
]


def _quantity_input(label: str, placeholder: str) -> forms.CharField:
    return forms.CharField(
        required=False,
        max_length=60,
        label=label,
        widget=forms.TextInput(attrs={"placeholder": placeholder, "autocomplete": "off"}),
    )


class EventForm(forms.Form):
    """An instrument event with the facts of its kind: a bake-out's zone temperatures and the
    base pressure after it, a transfer's cryogen and litres, a vent's gas; and the chamber it
    happened in (a load-lock vent is not a vent of the microscope).

    Quantities are typed with their unit ("135 degC", "2e-10 mbar", "12 L"); the raw text is
    kept in the event's details beside the converted values, so nothing typed is lost.
    """

    kind = forms.ChoiceField(
        choices=[(k.value, k.label) for k in EVENT_KINDS], label="What happened"
    )
    start = LabDateTimeField(label="Started", error_messages={"required": "give the start time"})
    end = LabDateTimeField(required=False, label="Ended")
    summary = forms.CharField(required=False, max_length=200, label="Summary")
    chamber = forms.ModelChoiceField(
        queryset=None, required=False, label="In", empty_label="the whole instrument"
    )
    base_pressure = _quantity_input("Base pressure after", "e.g. 2e-10 mbar")
    base_pressure_gauge = forms.CharField(required=False, max_length=100, label="Read on")
    cryogen = forms.ChoiceField(choices=CRYOGENS, required=False, label="Cryogen")
    taken = _quantity_input("Taken from the supply dewar", "e.g. 12 L")
    level_before = _quantity_input("Level before", "e.g. 18 %")
    level_after = _quantity_input("Level after", "e.g. 95 %")
    vented_with = forms.CharField(required=False, max_length=20, label="Vented with")

    def __init__(self, *args: Any, instrument: Instrument, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.instrument = instrument
        self.fields["chamber"].queryset = instrument.chambers.filter(retired_at__isnull=True)
        for i in range(1, ZONE_ROWS + 1):
            self.fields[f"zone_{i}_name"] = forms.CharField(
                required=False, max_length=60, label=f"Zone {i}"
            )
            self.fields[f"zone_{i}_temperature"] = _quantity_input(
                f"Zone {i} maximum temperature", "e.g. 135 degC"
            )

    def zone_rows(self) -> list[tuple[forms.BoundField, forms.BoundField]]:
        return [
            (self[f"zone_{i}_name"], self[f"zone_{i}_temperature"]) for i in range(1, ZONE_ROWS + 1)
        ]

    def _quantity(self, name: str, unit: str) -> float | None:
        text = str(self.cleaned_data.get(name) or "").strip()
        if not text:
            return None
        try:
            return parse_quantity(text, unit, field=name)
        except ScienceInputError as exc:
            self.add_error(name, str(exc).removeprefix(f"{name}: "))
            return None

    def clean(self) -> dict[str, Any]:
        data = super().clean()
        kind = data.get("kind")
        typed: dict[str, Any] = {}
        details: dict[str, Any] = {}
        if kind == InstrumentEvent.Kind.BAKEOUT:
            zones: dict[str, float] = {}
            for i in range(1, ZONE_ROWS + 1):
                name = str(data.get(f"zone_{i}_name") or "").strip()
                text = str(data.get(f"zone_{i}_temperature") or "").strip()
                if not name and not text:
                    continue
                if not name:
                    self.add_error(f"zone_{i}_name", "name the zone, e.g. chamber or cryostat")
                    continue
                kelvin = self._quantity(f"zone_{i}_temperature", "kelvin")
                if kelvin is None and not text:
                    self.add_error(f"zone_{i}_temperature", "give its maximum temperature")
                if kelvin is not None:
                    zones[name] = kelvin
                    typed[f"zone {name}"] = text
            if zones:
                details["zone_temperatures_k"] = zones
            pressure = self._quantity("base_pressure", "millibar")
            if pressure is not None:
                details["base_pressure_mbar"] = pressure
                typed["base_pressure"] = data["base_pressure"].strip()
                if data.get("base_pressure_gauge"):
                    details["base_pressure_gauge"] = data["base_pressure_gauge"].strip()
        elif kind == InstrumentEvent.Kind.CRYOGEN_TRANSFER:
            if data.get("cryogen"):
                details["cryogen"] = data["cryogen"]
            for name, key, unit in (
                ("taken", "taken_l", "liter"),
                ("level_before", "level_before_pct", "percent"),
                ("level_after", "level_after_pct", "percent"),
            ):
                value = self._quantity(name, unit)
                if value is not None:
                    details[key] = value
                    typed[name] = data[name].strip()
        elif kind == InstrumentEvent.Kind.VENT and data.get("vented_with"):
            details["vented_with"] = data["vented_with"].strip()
        if typed:
            details["as_typed"] = typed
        data["details"] = details
        return data

    def add_action_errors(self, error: ValidationError) -> None:
        if not hasattr(error, "error_dict"):
            self.add_error(None, error)
            return
        for name, problems in error.error_dict.items():
            for problem in problems:
                self.add_error(name if name in self.fields else None, " ".join(problem.messages))


# --- pages ------------------------------------------------------------------------------------


def _instrument(request: HttpRequest, pk: int) -> Instrument:
    return get_object_or_404(instruments_for(request.user), pk=pk)


@lab_member_required
@require_GET
def instrument_list(request: HttpRequest) -> HttpResponse:
    now = timezone.now()
    rows = [
        {"instrument": instrument, "state": state_view(state_at(instrument, now), live=True)}
        for instrument in instruments_for(request.user)
    ]
    return render(request, "instruments/instrument_list.html", {"rows": rows, "now": now})


@lab_member_required
@require_GET
def instrument_detail(request: HttpRequest, pk: int) -> HttpResponse:
    instrument = _instrument(request, pk)
    form = EventForm(instrument=instrument, initial={"start": lab_now_text(), "vented_with": "N2"})
    return render(request, "instruments/instrument.html", _page_context(request, instrument, form))


@lab_member_required
@require_http_methods(["POST"])
def log_event(request: HttpRequest, pk: int) -> HttpResponse:
    """The event form: logged through ``record_event``, or the page again with the errors
    beside their inputs and everything typed kept."""
    instrument = _instrument(request, pk)
    form = EventForm(request.POST, instrument=instrument)
    if form.is_valid():
        data = form.cleaned_data
        try:
            event = actions.record_event(
                instrument,
                kind=data["kind"],
                start=data["start"],
                end=data["end"],
                summary=data["summary"].strip(),
                details=data["details"],
                chamber=data["chamber"],
                actor=request.user,
            )
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(request, f"{event_title(event)} logged.")
            return redirect(reverse("instruments:event", args=[event.pk]))
    context = _page_context(request, instrument, form)
    return render(request, "instruments/instrument.html", context)


@lab_member_required
@require_GET
def state_part(request: HttpRequest, pk: int) -> HttpResponse:
    """htmx: the state table alone, every 30 s while the page shows the state now."""
    instrument = _instrument(request, pk)
    form = StateAtForm(request.GET)
    at = form.cleaned_data.get("at") if form.is_valid() else None
    state = state_at(instrument, at or timezone.now())
    return render(
        request,
        "instruments/_state.html",
        {"instrument": instrument, "state": state_view(state, live=at is None)},
    )


@lab_member_required
@require_GET
def event_detail(request: HttpRequest, pk: int) -> HttpResponse:
    event = get_object_or_404(
        InstrumentEvent.objects.filter(retired_at__isnull=True).select_related(
            "instrument", "recorded_by", "chamber"
        ),
        pk=pk,
    )
    # The plots around it: the event with a margin of a quarter of its length on each side.
    end = event.end or timezone.now()
    margin = max((end - event.start) / 4, timedelta(hours=1))
    around = {
        "since": _local_input(event.start - margin),
        "until": _local_input(min(end + margin, timezone.now())),
    }
    return render(
        request,
        "instruments/event.html",
        {
            "event": event_view(event),
            "instrument": event.instrument,
            "page_instrument": event.instrument,
            "plots_url": f"{reverse('instruments:instrument', args=[event.instrument_id])}"
            f"?{urlencode(around)}#plots",
        },
    )


@lab_member_required
@require_GET
def channel_plot(request: HttpRequest, pk: int, channel_id: int) -> HttpResponse:
    """One channel's plot as a PNG: ``?since=&until=`` (ISO 8601 with a zone) ``&w=&h=`` in
    pixels, ``&scale=2`` for a high-density screen. Cached (``labbook.web.plots``)."""
    instrument = _instrument(request, pk)
    channel = get_object_or_404(channels_of(instrument), pk=channel_id)
    try:
        since = _instant(request.GET.get("since"), "since")
        until = _instant(request.GET.get("until"), "until")
        size = plots.PlotSize(
            _whole(request.GET.get("w"), "w", 720),
            _whole(request.GET.get("h"), "h", 260),
            _whole(request.GET.get("scale"), "scale", 1),
        )
        plots.check_window(since, until)
    except plots.PlotRequestError as exc:
        return HttpResponseBadRequest(str(exc), content_type="text/plain; charset=utf-8")
    png = plots.channel_plot_png(channel, since, until, size)
    response = HttpResponse(png, content_type="image/png")
    # Private: a plot is lab data behind a login, never for a shared proxy. A window that
    # reaches to now gets a new URL when the page is drawn again, so a minute is plenty.
    live = until >= timezone.now() - timedelta(hours=1)
    patch_cache_control(response, private=True, max_age=60 if live else 3600)
    return response


def _instant(value: str | None, name: str) -> datetime:
    text = (value or "").strip()
    if not text:
        raise plots.PlotRequestError(f"{name} is missing: give an ISO 8601 instant with a zone")
    try:
        instant = datetime.fromisoformat(text)
    except ValueError:
        raise plots.PlotRequestError(f"{name} {text!r} is not an ISO 8601 instant") from None
    if instant.tzinfo is None:
        raise plots.PlotRequestError(f"{name} has no time zone; add Z or an offset")
    return instant.astimezone(UTC)


def _whole(value: str | None, name: str, default: int) -> int:
    if value in (None, ""):
        return default
    try:
        return int(value)
    except ValueError:
        raise plots.PlotRequestError(f"{name} must be a whole number of pixels") from None


# --- presenters -------------------------------------------------------------------------------


@dataclass
class Flag:
    """One thing the reader should notice, in words: 'stale', 'above UHV', 'bake-out under
    way'. ``tone`` is 'warn' or 'note' (CSS), ``detail`` says since when or why."""

    label: str
    tone: str = "note"
    detail: str = ""


@dataclass
class ChannelRow:
    channel: Channel
    t: datetime | None
    value: float | None
    age_text: str
    vacuum: str
    flags: list[Flag]

    @property
    def is_stale(self) -> bool:
        return any(f.label == "stale" for f in self.flags)

    @property
    def above_uhv(self) -> bool:
        return any(f.label == "above UHV" for f in self.flags)


@dataclass
class StateView:
    at: datetime
    live: bool
    channels: list[ChannelRow]
    flags: list[Flag]
    convention: str = ""


_CHANNEL_FLAGS = {
    "stale": Flag("stale", "note", "no new reading for more than three logging intervals"),
    "above_uhv": Flag("above UHV", "warn", "higher than ultra-high vacuum"),
    "not_a_vacuum": Flag("not a vacuum", "warn", "reads above atmospheric pressure"),
}


_LOAD_LOCK_ABOVE_UHV = Flag("above UHV", "note", "usual for a load lock between sample loads")


def _in_load_lock(channel: Channel) -> bool:
    return channel.chamber is not None and channel.chamber.kind == Chamber.Kind.LOAD_LOCK


def lab_time(value: datetime | None, fmt: str = "%Y-%m-%d %H:%M %Z") -> str:
    if value is None:
        return "—"
    return timezone.localtime(value, lab_zone()).strftime(fmt)


def _local_input(value: datetime) -> str:
    return timezone.localtime(value, lab_zone()).strftime("%Y-%m-%dT%H:%M")


def state_view(state: InstrumentState, *, live: bool) -> StateView:
    rows = []
    convention = ""
    for c in state.channels:
        flags = [_CHANNEL_FLAGS[f] for f in c.flags if f in _CHANNEL_FLAGS]
        if _in_load_lock(c.channel):
            # A load lock lives above UHV between loads: worth showing, not worth alarm.
            flags = [_LOAD_LOCK_ABOVE_UHV if f.label == "above UHV" else f for f in flags]
        vacuum = ""
        if c.vacuum_range is not None:
            vacuum = c.vacuum_range.label
            convention = c.vacuum_range.convention
        age = format_age(c.age) if c.t is not None else ""
        if not live and age:
            # An age at a past instant counts back from that instant, not from now.
            age = "at that instant" if age == "just now" else age.replace(" ago", " before")
        rows.append(ChannelRow(c.channel, c.t, c.value, age, vacuum, flags))
    return StateView(
        at=state.at,
        live=live,
        channels=rows,
        flags=_instrument_flags(state, rows),
        convention=convention,
    )


def _instrument_flags(state: InstrumentState, rows: list[ChannelRow]) -> list[Flag]:
    at = state.at
    flags: list[Flag] = []
    under_way = {
        kind: [
            e
            for e in state.events
            if e.kind == kind and e.start <= at and (e.end is None or e.end >= at)
        ]
        for kind in (InstrumentEvent.Kind.BAKEOUT, InstrumentEvent.Kind.CRYOGEN_TRANSFER)
    }
    for event in under_way[InstrumentEvent.Kind.BAKEOUT]:
        flags.append(Flag("Bake-out under way", "warn", f"since {lab_time(event.start)}"))
    for event in under_way[InstrumentEvent.Kind.CRYOGEN_TRANSFER]:
        cryogen = event.details.get("cryogen", "") if isinstance(event.details, dict) else ""
        what = f"{formula(cryogen)} transfer under way" if cryogen else "Cryogen transfer under way"
        flags.append(
            Flag(what, "warn", f"since {lab_time(event.start)}: expect drift and bubbling")
        )
    if not under_way[InstrumentEvent.Kind.CRYOGEN_TRANSFER]:
        ended = [
            e
            for e in state.events
            if e.kind == InstrumentEvent.Kind.CRYOGEN_TRANSFER and e.end is not None and e.end < at
        ]
        if "after_cryogen_transfer" in state.flags and ended:
            last = max(ended, key=lambda e: e.end)
            hours = int(AFTER_TRANSFER_WINDOW.total_seconds() // 3600)
            flags.append(
                Flag(
                    f"Within {hours} h after a cryogen transfer",
                    "warn",
                    f"it ended {lab_time(last.end)} ({format_age(at - last.end)}): "
                    "data taken now may drift",
                )
            )
    if "vented" in state.flags:
        flags.append(Flag("Vented", "warn", "a vent is logged as under way"))
    if "load_lock_vented" in state.flags:
        flags.append(Flag("Load lock vented", "note", "the other chambers stay in vacuum"))
    above = [r.channel for r in rows if r.above_uhv]
    if above:
        tone = "note" if all(_in_load_lock(c) for c in above) else "warn"
        flags.append(Flag("Pressure above UHV", tone, ", ".join(c.name for c in above)))
    return flags


EVENT_DETAIL_LABELS = {
    "base_pressure_mbar": "Base pressure after",
    "base_pressure_gauge": "Read on",
    "base_pressure_days_after": "Read after",
    "cryogen": "Cryogen",
    "taken_l": "Taken from the supply dewar",
    "level_before_pct": "Level before",
    "level_after_pct": "Level after",
    "chamber": "Chamber",
    "vented_with": "Vented with",
    "notes": "Notes",
}


@dataclass
class EventView:
    event: InstrumentEvent
    title: str
    facts: list[tuple[str, str]] = field(default_factory=list)
    duration: str = ""


def event_title(event: InstrumentEvent) -> str:
    title = event.get_kind_display().capitalize()
    cryogen = event.details.get("cryogen") if isinstance(event.details, dict) else None
    if event.kind == InstrumentEvent.Kind.CRYOGEN_TRANSFER and cryogen:
        title = f"{formula(cryogen)} transfer"
    return title


def _kelvin_text(kelvin: float) -> str:
    celsius = format_quantity(kelvin - 273.15, "degC")
    return f"{format_quantity(kelvin, 'K')} ({celsius})"


def _span_text(delta: timedelta) -> str:
    minutes = round(delta.total_seconds() / 60)
    if minutes < 120:
        return f"{minutes}\u00a0min"
    hours = delta.total_seconds() / 3600
    if hours < 72:
        return f"{hours:.0f}\u00a0h" if hours >= 10 else f"{hours:.1f}\u00a0h"
    return f"{hours / 24:.1f}\u00a0d"


def event_view(event: InstrumentEvent) -> EventView:
    """An event with its facts in trade units: zone maxima in K and °C, pressures in mbar."""
    details = event.details if isinstance(event.details, dict) else {}
    facts: list[tuple[str, str]] = []
    if event.chamber_id is not None:
        facts.append(("In", event.chamber.name))
    zones = details.get("zone_temperatures_k")
    if isinstance(zones, dict):
        for zone, kelvin in zones.items():
            if isinstance(kelvin, int | float) and math.isfinite(kelvin):
                facts.append((f"Maximum, {zone}", _kelvin_text(float(kelvin))))
    for key, value in details.items():
        if key in ("zone_temperatures_k", "as_typed") or value in (None, ""):
            continue
        label = EVENT_DETAIL_LABELS.get(key, key.replace("_", " ").capitalize())
        if key == "base_pressure_mbar":
            shown = format_quantity(value, "mbar", quantity="pressure")
        elif key == "base_pressure_days_after":
            shown = f"{value}\u00a0d"
        elif key.endswith("_l") and isinstance(value, int | float):
            shown = format_quantity(value, "L")
        elif key.endswith("_pct") and isinstance(value, int | float):
            shown = format_quantity(value, "%")
        elif key in ("cryogen", "vented_with"):
            shown = formula(str(value))
        else:
            shown = str(value)
        facts.append((label, shown))
    duration = _span_text(event.end - event.start) if event.end else ""
    return EventView(event=event, title=event_title(event), facts=facts, duration=duration)


# Image sizes in CSS pixels, drawn for the width they are shown at (no blurry scaling): two
# plots a row in the 78rem page, one on a 390 px phone.
WIDE = (580, 240)
NARROW = (344, 240)


@dataclass
class PlotView:
    channel: Channel
    alt: str
    wide: str
    wide_2x: str
    narrow: str
    narrow_2x: str
    wide_size: tuple[int, int] = WIDE
    narrow_size: tuple[int, int] = NARROW


def _plot_url(instrument: Instrument, channel: Channel, since, until, size, scale) -> str:
    query = urlencode(
        {
            "since": since.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "until": until.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "w": size[0] * scale,
            "h": size[1] * scale,
            **({"scale": scale} if scale != 1 else {}),
        }
    )
    return f"{reverse('instruments:plot', args=[instrument.pk, channel.pk])}?{query}"


def plot_views(instrument: Instrument, since: datetime, until: datetime) -> list[PlotView]:
    views = []
    window = f"{lab_time(since)} to {lab_time(until)}"
    for channel in channels_of(instrument):
        scale = "log scale, " if channel.quantity == Channel.Quantity.PRESSURE else ""
        alt = f"{channel.name} ({channel.unit}) from {window}, {scale}minimum to maximum band"
        views.append(
            PlotView(
                channel=channel,
                alt=alt,
                wide=_plot_url(instrument, channel, since, until, WIDE, 1),
                wide_2x=_plot_url(instrument, channel, since, until, WIDE, 2),
                narrow=_plot_url(instrument, channel, since, until, NARROW, 1),
                narrow_2x=_plot_url(instrument, channel, since, until, NARROW, 2),
            )
        )
    return views


def _plot_window(form: PlotRangeForm, at: datetime | None) -> tuple[datetime, datetime, str, bool]:
    """(since, until, preset chosen or '', custom?) for the plots."""
    now = timezone.now()
    if form.is_valid() and form.cleaned_data.get("since") is not None:
        since = form.cleaned_data["since"]
        until = form.cleaned_data.get("until") or now
        return since, min(until, now), "", True
    chosen = form.cleaned_data.get("range") if form.is_valid() else ""
    if not chosen and at is not None:
        # Looking at a past instant: the day around it.
        end = min(at + timedelta(hours=12), now)
        return end - timedelta(hours=24), end, "", True
    key = chosen or DEFAULT_RANGE
    since, until = plots.window_ending(now, RANGES[key][1])
    return since, until, key, False


def _page_context(request: HttpRequest, instrument: Instrument, event_form: EventForm) -> dict:
    at_form = StateAtForm(request.GET or None)
    at = at_form.cleaned_data.get("at") if at_form.is_valid() else None
    state = state_at(instrument, at or timezone.now())
    range_form = PlotRangeForm(request.GET or None)
    since, until, preset, custom = _plot_window(range_form, at)
    recent = events_between(instrument, timezone.now() - timedelta(days=90), None)
    recent = list(recent.select_related("recorded_by", "chamber").order_by("-start")[:10])
    first_error = next((name for name in event_form.fields if name in event_form.errors), "")
    here = reverse("instruments:instrument", args=[instrument.pk])
    return {
        "instrument": instrument,
        "page_instrument": instrument,
        "state": state_view(state, live=at is None),
        "at_form": at_form,
        "at_value": at_form.data.get("at", "") if at_form.is_bound else "",
        "range_form": range_form,
        "ranges": [
            {"key": key, "label": label, "url": f"{here}?{urlencode({'range': key})}#plots"}
            for key, (label, _) in RANGES.items()
        ],
        "preset": preset,
        "custom": custom,
        "since_value": range_form.data.get("since", "") if range_form.is_bound else "",
        "until_value": range_form.data.get("until", "") if range_form.is_bound else "",
        "since": since,
        "until": until,
        "plots": plot_views(instrument, since, until),
        "events": [event_view(e) for e in recent],
        "event_form": event_form,
        "event_kinds": EVENT_KINDS,
        "event_focus": f"id_{first_error}" if first_error else "",
        "event_errors": bool(event_form.errors),
    }
