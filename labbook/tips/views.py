"""The pages of tips, their mounting periods and conditioning events.

Views validate, call one action or query and render; the presenters at the bottom put the
stored SI parameters back into the units a lab reads them in ("100 V", "2 nm").
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

from django.contrib import messages
from django.core.exceptions import ValidationError
from django.http import HttpRequest, HttpResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.views.decorators.http import require_GET, require_http_methods

from labbook.accounts.permissions import lab_member_required
from labbook.instruments.queries import instruments_for
from labbook.samples.forms import lab_now_text, lab_zone
from labbook.tips import actions, queries
from labbook.tips.forms import (
    CONDITIONING_PARAMS,
    ConditioningForm,
    MountForm,
    UnmountForm,
)
from labbook.tips.models import Conditioning, Tip, TipMount
from labbook.web.templatetags.labbook_format import format_age, format_quantity, formula


@lab_member_required
@require_GET
def tip_list(request: HttpRequest) -> HttpResponse:
    tips = list(queries.tips_with_current_mount())
    return render(request, "tips/tip_list.html", {"tips": tips})


@lab_member_required
@require_GET
def tip_detail(request: HttpRequest, pk: int) -> HttpResponse:
    # A retired tip keeps its page and audit (its datasets link to it), read-only: the forms
    # are not shown and the actions behind them refuse it.
    tip = get_object_or_404(Tip, pk=pk)
    return render(request, "tips/tip_detail.html", _page(request, tip))


@lab_member_required
@require_http_methods(["POST"])
def mount(request: HttpRequest, pk: int) -> HttpResponse:
    """Put the tip into a scanner; an open mount of another tip there ends at this instant."""
    tip = get_object_or_404(queries.tips(), pk=pk)
    form = MountForm(request.POST, user=request.user)
    if form.is_valid():
        data = form.cleaned_data
        try:
            mounted = actions.mount_tip(
                tip,
                data["instrument"],
                start=data["start"],
                notes=data["notes"].strip(),
                actor=request.user,
            )
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(request, mounted_message(mounted))
            return redirect("tips:tip", pk=tip.pk)
    return render(request, "tips/tip_detail.html", _page(request, tip, mount_form=form))


@lab_member_required
@require_http_methods(["POST"])
def unmount(request: HttpRequest, pk: int) -> HttpResponse:
    tip = get_object_or_404(queries.tips(), pk=pk)
    form = UnmountForm(request.POST)
    current = queries.mount_of(tip)
    if current is None:
        form.add_error(None, f"tip {tip} is in no scanner now")
    elif form.is_valid():
        try:
            ended = actions.unmount_tip(current, end=form.cleaned_data["end"], actor=request.user)
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(
                request, f"{tip} taken out of {ended.instrument} at {lab_time(ended.end)}."
            )
            return redirect("tips:tip", pk=tip.pk)
    return render(request, "tips/tip_detail.html", _page(request, tip, unmount_form=form))


@lab_member_required
@require_http_methods(["POST"])
def log_conditioning(request: HttpRequest, pk: int) -> HttpResponse:
    tip = get_object_or_404(queries.tips(), pk=pk)
    form = ConditioningForm(request.POST, user=request.user)
    if form.is_valid():
        data = form.cleaned_data
        try:
            event = actions.record_conditioning(
                tip,
                kind=data["kind"],
                at=data["at"],
                params=form.params(),
                outcome=data["outcome"].strip(),
                instrument=data["instrument"],
                actor=request.user,
            )
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(
                request,
                f"{event.get_kind_display().capitalize()} on {tip} at {lab_time(event.at)} logged.",
            )
            return redirect(f"{reverse('tips:tip', args=[tip.pk])}#conditioning-{event.pk}")
    return render(request, "tips/tip_detail.html", _page(request, tip, conditioning_form=form))


# --- presenters -----------------------------------------------------------------------------


def lab_time(value) -> str:
    if value is None:
        return "—"
    return timezone.localtime(value, lab_zone()).strftime("%Y-%m-%d %H:%M %Z")


def mounted_message(mounted: actions.Mounted) -> str:
    mount = mounted.mount
    text = f"{mount.tip} mounted in {mount.instrument} from {lab_time(mount.start)}."
    if mounted.closed_previous is not None:
        text += f" {mounted.closed_previous.tip} came out at that instant: its mount is closed."
    return text


def datasets_of(tip: Tip) -> list[Any]:
    """The latest 50 datasets acquired with this tip, newest first (the tip audit's start)."""
    from labbook.datafiles.queries import files_of_tip

    return list(files_of_tip(tip).select_related("sample")[:50])


_TRAILING_ZEROS = re.compile(r"^(-?\d+)\.(\d*?)0+(?=\D|$)")
# Units of the parameter keys' suffixes as a lab writes them.
_SUFFIX_UNITS = (
    ("_n_per_m", "N/m"),
    ("_mbar", "mbar"),
    ("_ohm", "Ω"),
    ("_hz", "Hz"),
    ("_v", "V"),
    ("_a", "A"),
    ("_s", "s"),
    ("_m", "m"),
    ("_k", "K"),
)
_PARAM_LABELS = {key: label for _name, key, label, _unit, _example in CONDITIONING_PARAMS}


def _plain(text: str) -> str:
    """'2.00 nm' -> '2 nm', '1.50 nA' -> '1.5 nA': the figures a value was typed with, not
    the three the formatter shows by default."""
    return _TRAILING_ZEROS.sub(
        lambda m: m.group(1) + (f".{m.group(2)}" if m.group(2) else ""), text
    )


def param_text(key: str, value: Any) -> str:
    """A stored parameter in readable units: ``("depth_m", 2e-9)`` -> ``"2 nm"``."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return formula(str(value)) if key == "species" else str(value)
    if not math.isfinite(value):
        return str(value)
    for suffix, unit in _SUFFIX_UNITS:
        if key.lower().endswith(suffix):
            if unit == "s" and 0 < abs(value) < 1:
                # Pulses are milliseconds; the formatter gives seconds no prefix.
                return _plain(format_quantity(value * 1000, "ms"))
            return _plain(format_quantity(value, unit))
    return _plain(format_quantity(value, ""))


def _same_text(typed: str, shown: str) -> bool:
    """Whether what was typed reads the same as what is shown ("1 uA" and "1 µA", "100 kohm"
    and "100 kΩ"): then there is no point in showing it twice."""

    def canonical(text: str) -> str:
        text = "".join(text.split()).lower()
        return text.replace("µ", "u").replace("μ", "u").replace("ω", "ohm")

    return canonical(typed) == canonical(shown)


def param_label(key: str) -> str:
    if key in _PARAM_LABELS:
        return _PARAM_LABELS[key]
    words = key
    for suffix, _unit in _SUFFIX_UNITS:
        if key.lower().endswith(suffix):
            words = key[: -len(suffix)]
            break
    return words.replace("_", " ").capitalize()


@dataclass
class ConditioningView:
    event: Conditioning
    params: list[tuple[str, str, str]]  # label, value, as typed


def conditioning_view(event: Conditioning) -> ConditioningView:
    params = event.params if isinstance(event.params, dict) else {}
    raw = event.params_raw if isinstance(event.params_raw, dict) else {}
    rows = []
    # The form's order (voltage, current, duration …), then whatever else, alphabetically.
    order = {key: i for i, (_name, key, *_rest) in enumerate(CONDITIONING_PARAMS)}
    for key in sorted(params, key=lambda k: (order.get(k, len(order)), k)):
        shown = param_text(key, params[key])
        typed = str(raw.get(key, ""))
        rows.append((param_label(key), shown, "" if _same_text(typed, shown) else typed))
    return ConditioningView(event=event, params=rows)


@dataclass
class SensorRow:
    label: str
    measured: str
    nominal: str
    difference: str

    @property
    def against_nominal(self) -> str:
        """'nominal 1800 N/m, +7.2 %': how far the sensor is from its data sheet."""
        if self.nominal == "—":
            return ""
        return f"nominal {self.nominal}" + (f", {self.difference}" if self.difference else "")


def _difference(measured: float | None, nominal: float | None) -> str:
    if measured is None or nominal is None or nominal == 0:
        return ""
    percent = 100 * (measured - nominal) / nominal
    return f"{percent:+.1f}\u00a0%"


def sensor_rows(tip: Tip) -> list[SensorRow]:
    """The force sensor measured beside nominal: nc-AFM forces are only as good as the k used."""
    if not tip.sensor_kind:
        return []
    rows = []
    for label, measured, nominal, unit in (
        ("Resonance f₀", tip.resonance_frequency_hz, tip.resonance_frequency_nominal_hz, "Hz"),
        ("Stiffness k", tip.stiffness_n_per_m, tip.stiffness_nominal_n_per_m, "N/m"),
        ("Quality factor Q", tip.quality_factor, None, ""),
    ):
        if measured is None and nominal is None:
            continue
        rows.append(
            SensorRow(
                label,
                _plain(format_quantity(measured, unit, digits=5)) if measured is not None else "—",
                _plain(format_quantity(nominal, unit, digits=5)) if nominal is not None else "—",
                _difference(measured, nominal),
            )
        )
    return rows


@dataclass
class MountRow:
    mount: TipMount
    duration: str


def _duration(mount: TipMount) -> str:
    end = mount.end or timezone.now()
    days = (end - mount.start).total_seconds() / 86400
    if days >= 2:
        return f"{int(days)}\u00a0d"
    hours = days * 24
    return f"{hours:.1f}\u00a0h" if hours < 10 else f"{hours:.0f}\u00a0h"


def _page(
    request: HttpRequest,
    tip: Tip,
    *,
    mount_form: MountForm | None = None,
    unmount_form: UnmountForm | None = None,
    conditioning_form: ConditioningForm | None = None,
) -> dict[str, Any]:
    now = timezone.now()
    state = queries.tip_state(tip, now)
    mounts = [
        MountRow(m, _duration(m)) for m in queries.mounts_of(tip).select_related("mounted_by")
    ]
    events = queries.conditioning_of(tip).select_related("instrument", "performed_by")
    since_mount = {e.pk for e in state.events} if state else set()
    now_text = lab_now_text()
    mount_initial: dict[str, Any] = {"start": now_text}
    last = mounts[-1].mount if mounts else None
    if last is not None:
        mount_initial["instrument"] = last.instrument_id
    else:
        only = list(instruments_for(request.user)[:2])
        if len(only) == 1:
            mount_initial["instrument"] = only[0].pk
    forms_with_errors = [
        f for f in (mount_form, unmount_form, conditioning_form) if f is not None and f.errors
    ]
    focus = ""
    for form in forms_with_errors:
        first = next((name for name in form.fields if name in form.errors), "")
        if first:
            focus = form[first].auto_id
            break
    return {
        "tip": tip,
        "state": state,
        "mount_age": format_age(now - state.mount.start) if state and state.mount else "",
        "apex": state.apex_species if state else None,
        "page_instrument": state.instrument if state else None,
        "note_tip": tip,
        "sensor": sensor_rows(tip),
        "mounts": mounts,
        "events": [conditioning_view(e) for e in events],
        "since_mount": since_mount,
        "datasets": datasets_of(tip),
        "mount_form": mount_form or MountForm(user=request.user, initial=mount_initial),
        "unmount_form": unmount_form or UnmountForm(initial={"end": now_text}),
        "conditioning_form": conditioning_form
        or ConditioningForm(user=request.user, initial={"at": now_text}),
        "focus": focus,
    }
