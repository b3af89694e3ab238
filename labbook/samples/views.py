"""The pages of samples and preparations: the chamber-PC preparation log, the samples list, a
sample's history and surface state, and one preparation with every value as typed and derived.

Views validate, call one action and render. What a page shows is assembled by the small
presenters at the bottom of this module from the samples queries; no dose is computed here.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from django.contrib import messages
from django.core.exceptions import ValidationError
from django.http import Http404, HttpRequest, HttpResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.views.decorators.http import require_GET, require_http_methods

from labbook.accounts.permissions import lab_member_required
from labbook.instruments.models import Instrument
from labbook.instruments.queries import instruments_for
from labbook.samples import actions, queries
from labbook.samples.forms import (
    PreparationForm,
    SampleForm,
    StepRow,
    as_input_text,
    attach_errors,
    build_row,
    choice_label,
    field_label,
    lab_now_text,
    lab_zone,
    new_token,
    number_rows,
    rows_from_post,
    rows_from_template,
    unit_shown,
)
from labbook.samples.models import (
    DepositionSource,
    Preparation,
    PreparationStep,
    Recipe,
    Sample,
    Transfer,
)
from labbook.samples.steps import STEP_KINDS, Measure, Reference, StepErrors
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity
from labbook.web.templatetags.labbook_format import format_quantity, formula

# --- the preparation log ----------------------------------------------------------------------

_MEMORY = "samples.log"  # session key: the last instrument, and the last sample per instrument
_FORM_FIELDS = {
    "instrument": "Instrument",
    "sample": "Sample",
    "started_at": "Started",
    "ended_at": "Ended",
    "notes": "Notes",
}


@dataclass
class StartOption:
    """One way to begin the steps: a recipe, the sample's last preparation, or nothing."""

    value: str
    title: str
    detail: str
    kind: str
    checked: bool = False

    @property
    def id(self) -> str:
        return "start-" + self.value.replace(":", "-")


@dataclass
class Start:
    steps: list[dict[str, Any]]
    recipe: Recipe | None
    title: str


@dataclass
class LogPage:
    """Everything the log page shows: the form, the start options, the step rows."""

    form: PreparationForm
    instruments: list[Instrument]
    instrument_id: str
    samples: list[Sample]
    sample_id: str
    options: list[StartOption]
    start: str
    loaded: str
    rows: list[StepRow]
    show_errors: bool = False
    other_errors: dict[str, str] = field(default_factory=dict)
    loaded_notice: str = ""
    autofocus_id: str = ""

    def context(self) -> dict[str, Any]:
        zone = lab_zone()
        return {
            "form": self.form,
            "instruments": self.instruments,
            "instrument_id": self.instrument_id,
            "samples": self.samples,
            "sample_id": self.sample_id,
            "start_options": self.options,
            "loaded": self.loaded,
            "rows": self.rows,
            "kinds": [(kind.name, kind.label) for kind in STEP_KINDS.values()],
            "error_summary": self.error_summary() if self.show_errors else [],
            "form_errors": self.form_errors() if self.show_errors else {},
            "steps_error": self.other_errors.get("steps", "") if self.show_errors else "",
            "loaded_notice": self.loaded_notice,
            "autofocus_id": self.autofocus_id or self.default_focus(),
            "zone_abbreviation": timezone.localtime(timezone.now(), zone).tzname(),
            "started_value": self.form.raw("started_at"),
            "ended_value": self.form.raw("ended_at"),
            "notes_value": self.form.raw("notes"),
            "twin_id": self.twin_id(),
        }

    def twin_id(self) -> str:
        """The preparation already logged at this instant, when that is what the save met."""
        match = re.search(r"\(#(\d+)\)", self.other_errors.get("started_at", ""))
        return match.group(1) if match else ""

    def form_errors(self) -> dict[str, str]:
        """Errors of the preparation's own fields, from the form or from the action (a retired
        sample, a preparation already logged at that instant, an end before the start)."""
        errors = {name: " ".join(problems) for name, problems in self.form.errors.items()}
        for name in _FORM_FIELDS:
            if name in self.other_errors:
                errors[name] = self.other_errors[name]
        return errors

    def error_summary(self) -> list[dict[str, str]]:
        entries = []
        for name, message in self.form_errors().items():
            target = f"id_{name}" if name in _FORM_FIELDS else "log-form"
            text = f"{_FORM_FIELDS.get(name, name)}: {message}"
            entries.append({"target": target, "text": text})
        for row in self.rows:
            where = f"Step {row.number} ({row.label})"
            if row.error:
                entries.append({"target": f"step-{row.token}", "text": f"{where}: {row.error}"})
            for f in row.fields:
                if f.error:
                    entries.append({"target": f.id, "text": f"{where} · {f.label}: {f.error}"})
            if row.notes_error:
                text = f"{where} · Note: {row.notes_error}"
                entries.append({"target": f"{row.prefix}-notes", "text": text})
        if "steps" in self.other_errors:
            entries.append({"target": "add-step", "text": f"Steps: {self.other_errors['steps']}"})
        for name, message in self.other_errors.items():
            if name not in _FORM_FIELDS and name != "steps":
                label = field_label(name) if name != "recipe" else "Recipe"
                entries.append({"target": "log-start", "text": f"{label}: {message}"})
        return entries

    def default_focus(self) -> str:
        """The first useful field: the first one in error, else the first thing to choose."""
        if self.show_errors:
            form_errors = self.form_errors()
            for name in ("instrument", "sample", "started_at"):
                if name in form_errors:
                    return f"id_{name}"
            for row in self.rows:
                for f in row.fields:
                    if f.error:
                        return f.id
                if row.notes_error:
                    return f"{row.prefix}-notes"
                if row.error:
                    return row.fields[0].id if row.fields else f"{row.prefix}-notes"
            if "ended_at" in form_errors:
                return "id_ended_at"
            if "steps" in self.other_errors:
                return "add-step-first"
        if not self.instrument_id:
            return "id_instrument"
        if not self.sample_id:
            return "id_sample"
        checked = next((o for o in self.options if o.checked), None)
        if checked is not None or self.options:
            return (checked or self.options[0]).id
        return "add-step-first"


def _memory(request: HttpRequest) -> dict[str, Any]:
    memory = request.session.get(_MEMORY)
    return memory if isinstance(memory, dict) else {}


def _remember(request: HttpRequest, preparation: Preparation) -> None:
    """The chamber PC belongs to one instrument at a time: next time, that instrument and the
    sample last logged on it come preselected."""
    memory = _memory(request)
    by_instrument = dict(memory.get("samples") or {})
    by_instrument[str(preparation.instrument_id)] = preparation.sample_id
    request.session[_MEMORY] = {"instrument": preparation.instrument_id, "samples": by_instrument}


def _pick(wanted: Any, choices: Iterable[Any]) -> str:
    ids = {str(c.pk) for c in choices}
    text = str(wanted) if wanted not in (None, "") else ""
    return text if text in ids else ""


def _default_instrument(request: HttpRequest, instruments: list[Instrument], sample_id: str) -> str:
    for wanted in (request.GET.get("instrument"), _memory(request).get("instrument")):
        chosen = _pick(wanted, instruments)
        if chosen:
            return chosen
    if sample_id:  # arriving from a sample's page: where that sample was last prepared
        last = Preparation.objects.filter(sample_id=sample_id, retired_at__isnull=True)
        chosen = _pick(
            last.order_by("-started_at").values_list("instrument_id", flat=True).first(),
            instruments,
        )
        if chosen:
            return chosen
    own = Preparation.objects.filter(operator=request.user, retired_at__isnull=True)
    chosen = _pick(
        own.order_by("-started_at").values_list("instrument_id", flat=True).first(), instruments
    )
    if chosen:
        return chosen
    return str(instruments[0].pk) if len(instruments) == 1 else ""


def _remembered_sample(request: HttpRequest, instrument_id: str, samples: list[Sample]) -> str:
    """The sample last logged on this instrument from this session; failing that (a new
    session), the one this person last prepared on it."""
    if not instrument_id:
        return ""
    by_instrument = _memory(request).get("samples") or {}
    chosen = _pick(by_instrument.get(instrument_id), samples)
    if chosen:
        return chosen
    own = Preparation.objects.filter(
        operator=request.user, instrument_id=instrument_id, retired_at__isnull=True
    )
    return _pick(own.order_by("-started_at").values_list("sample_id", flat=True).first(), samples)


def _sources(instrument_id: str) -> list[tuple[int, str]]:
    if not instrument_id:
        return []
    sources = DepositionSource.objects.filter(instrument_id=instrument_id, retired_at__isnull=True)
    return [(s.pk, f"{s.name} ({s.material})") for s in sources]


def _kinds_summary(kinds: list[str]) -> str:
    """'3 × (sputter, anneal), deposit': a recipe's steps at a glance."""
    names = [STEP_KINDS[k].label.lower() if k in STEP_KINDS else k for k in kinds]
    parts: list[str] = []
    i = 0
    while i < len(names):
        best_length, best_repeats = 1, 1
        for length in (1, 2, 3):
            pattern = names[i : i + length]
            if len(pattern) < length:
                break
            repeats = 1
            while names[i + repeats * length : i + (repeats + 1) * length] == pattern:
                repeats += 1
            if repeats > 1 and repeats * length > best_length * best_repeats:
                best_length, best_repeats = length, repeats
        pattern = names[i : i + best_length]
        text = ", ".join(pattern)
        if best_repeats > 1:
            text = f"{best_repeats} × ({text})" if best_length > 1 else f"{best_repeats} × {text}"
        parts.append(text)
        i += best_length * best_repeats
    return ", ".join(parts)


def lab_time(value: datetime | None) -> str:
    """A time as the pages show it: in the lab's zone, the zone named ('2026-03-02 10:00 CET')."""
    if value is None:
        return "—"
    return timezone.localtime(value, lab_zone()).strftime("%Y-%m-%d %H:%M %Z")


def _start_options(sample: Sample | None, instrument_id: str, checked: str) -> list[StartOption]:
    options: list[StartOption] = []
    if sample is not None:
        last = None
        if instrument_id:
            last = queries.last_preparation(sample, instrument=int(instrument_id))
        last = last or queries.last_preparation(sample)
        if last is not None:
            steps = list(last.steps.all())
            followed = f" · from {last.recipe}" if last.recipe_id else ""
            options.append(
                StartOption(
                    value=f"repeat:{last.pk}",
                    title="Repeat this sample's last preparation",
                    detail=f"{lab_time(last.started_at)}{followed} · "
                    f"{_kinds_summary([s.kind for s in steps])}",
                    kind="repeat",
                )
            )
    substrate = (sample.substrate if sample else "").strip().lower()
    recipes = list(queries.current_recipes())
    # Recipes meant for this sample's surface come first; the rest stay reachable.
    recipes.sort(
        key=lambda r: (bool(substrate) and r.substrate.strip().lower() != substrate, r.name.lower())
    )
    for recipe in recipes:
        detail = _kinds_summary([str(s.get("kind", "")) for s in recipe.steps])
        if recipe.substrate:
            detail += f" · for {recipe.substrate}"
        options.append(
            StartOption(
                value=f"recipe:{recipe.pk}",
                title=f"{recipe.name} v{recipe.version}",
                detail=detail,
                kind="recipe",
            )
        )
    options.append(
        StartOption(value="blank", title="Ad-hoc steps", detail="add them one by one", kind="blank")
    )
    for option in options:
        option.checked = option.value == checked
    return options


def _resolve_start(value: str) -> Start | None:
    """The steps a start option stands for, and the recipe version the preparation follows."""
    kind, _, ident = (value or "").partition(":")
    if kind == "blank":
        return Start([], None, "ad-hoc steps")
    if not ident.isdigit():
        return None
    if kind == "recipe":
        recipe = Recipe.objects.filter(pk=int(ident), retired_at__isnull=True).first()
        if recipe is None:
            return None
        return Start(actions.steps_from_recipe(recipe), recipe, f"recipe {recipe}")
    if kind == "repeat":
        preparation = (
            Preparation.objects.filter(pk=int(ident), retired_at__isnull=True)
            .select_related("recipe")
            .first()
        )
        if preparation is None:
            return None
        steps = preparation.steps.order_by("position")
        return Start(
            [queries.step_as_template(step) for step in steps],
            preparation.recipe,
            f"the preparation of {lab_time(preparation.started_at)}",
        )
    return None


def _choices(request: HttpRequest) -> tuple[list[Instrument], list[Sample]]:
    return list(instruments_for(request.user)), list(queries.samples())


def _sample_in(samples: list[Sample], sample_id: str) -> Sample | None:
    return next((s for s in samples if str(s.pk) == sample_id), None)


def _log_page_from_get(request: HttpRequest) -> LogPage:
    instruments, samples = _choices(request)
    asked_sample = _pick(request.GET.get("sample"), samples)
    instrument_id = _default_instrument(request, instruments, asked_sample)
    sample_id = asked_sample or _remembered_sample(request, instrument_id, samples)
    start = str(request.GET.get("start", ""))
    resolved = _resolve_start(start) if start else None
    rows: list[StepRow] = []
    if resolved is None:
        start = ""
    else:
        rows = rows_from_template(resolved.steps, sources=_sources(instrument_id))
    form = PreparationForm(
        instruments=instruments_for(request.user),
        samples=queries.samples(),
        initial={"started_at": lab_now_text()},
    )
    return LogPage(
        form=form,
        instruments=instruments,
        instrument_id=instrument_id,
        samples=samples,
        sample_id=sample_id,
        options=_start_options(_sample_in(samples, sample_id), instrument_id, start),
        start=start,
        loaded=start,
        rows=rows,
    )


def _log_page_from_post(request: HttpRequest) -> LogPage:
    instruments, samples = _choices(request)
    data = request.POST
    instrument_id = _pick(data.get("instrument"), instruments)
    sample_id = _pick(data.get("sample"), samples)
    loaded = str(data.get("loaded", ""))
    start = str(data.get("start", "") or loaded)
    form = PreparationForm(
        data, instruments=instruments_for(request.user), samples=queries.samples()
    )
    rows = rows_from_post(data, sources=_sources(instrument_id))
    return LogPage(
        form=form,
        instruments=instruments,
        instrument_id=instrument_id,
        samples=samples,
        sample_id=sample_id,
        options=_start_options(_sample_in(samples, sample_id), instrument_id, start),
        start=start,
        loaded=loaded,
        rows=rows,
    )


def _edit_rows(page: LogPage, data: Mapping[str, Any]) -> bool:
    """The row buttons when JavaScript is off (with it, htmx and log.js do the same in place):
    add a step of a kind, copy a step to the end, remove a step. True when one was pressed."""
    sources = _sources(page.instrument_id)
    if data.get("add") in STEP_KINDS:
        row = build_row(str(data["add"]), {}, token=new_token(), sources=sources, autofocus=True)
        page.rows.append(row)
        page.autofocus_id = next((f.id for f in row.fields if f.autofocus), "")
    elif data.get("copy"):
        original = next((r for r in page.rows if r.token == data["copy"]), None)
        if original is not None:
            copy = build_row(
                original.kind,
                original.as_step(),
                token=new_token(),
                sources=sources,
                autofocus=True,
                from_template=False,
            )
            page.rows.append(copy)
            page.autofocus_id = next((f.id for f in copy.fields if f.autofocus), "")
    elif data.get("remove"):
        page.rows = [r for r in page.rows if r.token != data["remove"]]
        page.autofocus_id = "add-step-first"
    else:
        return False
    number_rows(page.rows)
    return True


def _load_start(page: LogPage) -> bool:
    """A start option chosen but its steps not on the page yet (no JavaScript, or Enter pressed
    before they arrived): load them and show them instead of saving steps nobody has seen."""
    if not page.start or page.start == page.loaded:
        return False
    resolved = _resolve_start(page.start)
    if resolved is None:
        return False
    page.rows = rows_from_template(resolved.steps, sources=_sources(page.instrument_id))
    page.loaded = page.start
    if page.rows:
        page.loaded_notice = (
            f"The steps of {resolved.title} are below. Check them, then press Enter "
            "(or Save preparation) to log it."
        )
    else:
        page.loaded_notice = "Add the steps below, then press Enter to log the preparation."
    option = next((o for o in page.options if o.value == page.start), None)
    page.autofocus_id = option.id if option else ""
    return True


@lab_member_required
@require_http_methods(["GET", "POST"])
def log_preparation(request: HttpRequest) -> HttpResponse:
    """The chamber-PC page: everything on one form, saved in one request by
    ``record_preparation`` (all or nothing), or shown again with every typed value kept."""
    if request.method == "GET":
        return render(request, "samples/log.html", _log_page_from_get(request).context())

    page = _log_page_from_post(request)
    # A start chosen since the page was drawn replaces the steps first (as it does at once
    # with JavaScript); a row button then works on what is shown.
    loaded = _load_start(page)
    if _edit_rows(page, request.POST) or loaded:
        return render(request, "samples/log.html", page.context())

    page.show_errors = True
    if page.form.is_valid():
        data = page.form.cleaned_data
        start = _resolve_start(page.loaded) if page.loaded else None
        try:
            preparation = actions.record_preparation(
                sample=data["sample"],
                instrument=data["instrument"],
                started_at=data["started_at"],
                ended_at=data["ended_at"],
                steps=[row.as_step() for row in page.rows],
                recipe=start.recipe if start else None,
                notes=data["notes"],
                actor=request.user,
            )
        except StepErrors as exc:
            errors = dict(exc.errors)
            if not any(key.startswith("steps") for key in errors):
                # The action stopped before the steps (an instant already logged): check
                # them too, so one round trip shows every mistake.
                errors |= _step_errors(page.rows)
            page.other_errors = attach_errors(page.rows, errors)
        else:
            _remember(request, preparation)
            messages.success(request, saved_message(preparation))
            return redirect("samples:preparation", pk=preparation.pk)
    else:
        # Check the steps too, so one round trip shows every mistake at once.
        page.other_errors = attach_errors(page.rows, _step_errors(page.rows))
    return render(request, "samples/log.html", page.context())


def _step_errors(rows: list[StepRow]) -> dict[str, str]:
    from labbook.samples.steps import normalise_steps

    try:
        normalise_steps([row.as_step() for row in rows])
    except StepErrors as exc:
        # A calibrated source cannot be checked without the instrument; the save will.
        return {k: v for k, v in exc.errors.items() if not k.endswith(".source")}
    return {}


@lab_member_required
@require_GET
def log_step(request: HttpRequest) -> HttpResponse:
    """htmx: a new step row of a kind, or a copy of the row whose inputs came along."""
    instrument_id = str(request.GET.get("instrument", ""))
    sources = _sources(instrument_id) if instrument_id.isdigit() else []
    kind = str(request.GET.get("add", ""))
    if request.GET.get("copy"):
        originals = [r for r in rows_from_post(request.GET) if r.token == request.GET["copy"]]
        if not originals:
            raise Http404("no such step on the page")
        row = build_row(
            originals[0].kind,
            originals[0].as_step(),
            token=new_token(),
            sources=sources,
            autofocus=True,
            from_template=False,
        )
    elif kind in STEP_KINDS:
        row = build_row(kind, {}, token=new_token(), sources=sources, autofocus=True)
    else:
        raise Http404("unknown step kind")
    return render(request, "samples/_log_step.html", {"row": row})


@lab_member_required
@require_GET
def log_steps(request: HttpRequest) -> HttpResponse:
    """htmx: the steps of the start option just chosen, in place of the ones shown."""
    start = str(request.GET.get("start", ""))
    resolved = _resolve_start(start)
    if resolved is None:
        raise Http404("no such recipe or preparation")
    instrument_id = str(request.GET.get("instrument", ""))
    sources = _sources(instrument_id) if instrument_id.isdigit() else []
    rows = rows_from_template(resolved.steps, sources=sources)
    return render(request, "samples/_log_steps.html", {"rows": rows, "loaded": start})


@lab_member_required
@require_GET
def log_choices(request: HttpRequest) -> HttpResponse:
    """htmx: after the instrument changes, the sample remembered for it (and the start options
    for that sample); after the sample changes, its start options."""
    instruments, samples = _choices(request)
    instrument_id = _pick(request.GET.get("instrument"), instruments)
    sample_id = _pick(request.GET.get("sample"), samples)
    if request.GET.get("which") == "instrument":
        sample_id = _remembered_sample(request, instrument_id, samples) or sample_id
    start = str(request.GET.get("start", ""))
    context = {
        "samples": samples,
        "sample_id": sample_id,
        "start_options": _start_options(_sample_in(samples, sample_id), instrument_id, start),
        "form_errors": {},
        "autofocus_id": "",
    }
    if request.GET.get("which") == "instrument":
        return render(request, "samples/_log_sample_swap.html", context)
    return render(request, "samples/_log_start.html", context)


# --- samples ----------------------------------------------------------------------------------


@lab_member_required
@require_http_methods(["GET", "POST"])
def sample_list(request: HttpRequest) -> HttpResponse:
    form = SampleForm(request.POST or None)
    if request.method == "POST" and form.is_valid():
        try:
            sample = actions.create_sample(**form.cleaned_data, actor=request.user)
        except ValidationError as exc:
            form.add_action_errors(exc)
        else:
            messages.success(request, f"Sample {sample.name} added.")
            return redirect("samples:sample", pk=sample.pk)
    now = timezone.now()
    rows = [_sample_row(sample, now) for sample in queries.samples()]
    focus = next((name for name in form.fields if name in form.errors), "")
    return render(
        request, "samples/sample_list.html", {"rows": rows, "form": form, "focus_field": focus}
    )


@lab_member_required
@require_GET
def sample_detail(request: HttpRequest, pk: int) -> HttpResponse:
    # A retired sample keeps its page (datasets and provenance link to it), read-only.
    sample = get_object_or_404(Sample, pk=pk)
    now = timezone.now()
    state = queries.surface_state(sample, now)
    location = queries.location_at(sample, now)
    history = [_history_entry(entry) for entry in reversed(queries.sample_history(sample))]
    return render(
        request,
        "samples/sample_detail.html",
        {
            "sample": sample,
            "state": _surface_view(state),
            "location": location,
            "history": history,
            "log_url": f"{reverse('samples:log')}?sample={sample.pk}",
        },
    )


@lab_member_required
@require_GET
def preparation_detail(request: HttpRequest, pk: int) -> HttpResponse:
    # A retired preparation keeps its page (datasets' lineage links to it), read-only.
    preparation = get_object_or_404(
        Preparation.objects.select_related("sample", "instrument", "operator", "recipe"),
        pk=pk,
    )
    steps = list(preparation.steps.order_by("position").select_related("source", "calibration"))
    first_record = (
        preparation.history.order_by("history_date").select_related("history_user").first()
    )
    return render(
        request,
        "samples/preparation_detail.html",
        {
            "preparation": preparation,
            "steps": [step_view(step) for step in steps],
            "changes": _recipe_changes(preparation, steps),
            "logged": first_record,
        },
    )


# --- presenters: what the read pages show, in readable units ----------------------------------

_DERIVED = {
    "fluence_per_cm2": ("Ion fluence", "ions/cm²"),
    "pressure_mbar_corrected": ("True pressure", "mbar"),
    "exposure_langmuir": ("Exposure at the gauge reading", "L"),
    "exposure_langmuir_corrected": ("Exposure at the true pressure", "L"),
    "impingement_per_cm2": ("Impingement", "molecules/cm²"),
    "coverage_ml": ("Nominal coverage", "ML"),
    "rate_used_ml_per_min": ("Rate used", "ML/min"),
}
# Shown with the line above them, or not worth a line of their own.
_FOLDED = {"coverage_uncertainty_ml", "rate_origin", "calibration"}
_TEXT_AS_FORMULA = {"gas", "gauge_gas", "material"}


def duration_text(seconds: float | None) -> str:
    """'10 min', '1 h 30 min', '12 min 30 s', '45 s'."""
    if seconds is None:
        return "—"
    whole = round(seconds)
    if abs(seconds - whole) > 1e-6 and seconds < 60:
        return format_quantity(seconds, "s")
    hours, rest = divmod(int(whole), 3600)
    minutes, secs = divmod(rest, 60)
    parts = [f"{n}\u00a0{u}" for n, u in ((hours, "h"), (minutes, "min"), (secs, "s")) if n]
    return " ".join(parts) or "0\u00a0s"


def show_value(value: Any, unit: str) -> str:
    """A stored value in the unit a lab reads it in."""
    if value is None or value == "":
        return "—"
    if unit == "s":
        return duration_text(value)
    if unit == "eV" and abs(value) >= 1000:
        return format_quantity(value / 1000, "keV")
    if unit == "K" and value >= 273.15:
        return f"{format_quantity(value, 'K')} ({format_quantity(value - 273.15, 'degC')})"
    return format_quantity(value, unit_shown(unit))


def with_uncertainty(value: float, sigma: float, unit: str) -> str:
    """'0.3010 ± 0.0007 ML': the uncertainty to two figures, the value to the same place."""
    if not sigma or sigma <= 0 or not math.isfinite(sigma):
        return format_quantity(value, unit)
    decimals = max(0, 1 - math.floor(math.log10(sigma)))
    if decimals > 8:  # far below anything a coverage resolves: say it plainly
        return f"{format_quantity(value, '')} ± {format_quantity(sigma, unit, digits=2)}"
    return f"{value:.{decimals}f} ± {sigma:.{decimals}f}\u00a0{unit}"


@dataclass
class ValueLine:
    label: str
    value: str
    typed: str = ""
    canonical: str = ""  # the stored number in the field's canonical unit


@dataclass
class StepView:
    step: PreparationStep
    number: int
    label: str
    values: list[ValueLine]
    derived: list[ValueLine]


def _field_line(step: PreparationStep, name: str, spec: Any) -> ValueLine | None:
    typed = step.raw_input.get(name)
    typed_text = "" if typed is None else str(typed)
    if isinstance(spec, Reference):
        if not step.source_id:
            return None
        return ValueLine(field_label(name), str(step.source), typed_text)
    value = getattr(step, name, None)
    if value in (None, "") and not typed_text:
        return None
    canonical = ""
    if isinstance(spec, Measure):
        shown = show_value(value, spec.unit)
        if value is not None:
            canonical = f"{as_input_text(value)} {unit_shown(spec.unit)}".strip()
    elif name in _TEXT_AS_FORMULA:
        shown = formula(value)
    else:
        shown = choice_label(str(value)) if value not in (None, "") else "—"
    return ValueLine(field_label(name), shown, typed_text, canonical)


def _derived_lines(step: PreparationStep) -> list[ValueLine]:
    kind = STEP_KINDS.get(step.kind)
    if kind is None:
        return []
    lines: list[ValueLine] = []
    for name in kind.derived_fields:
        if name in kind.fields or name in _FOLDED:
            continue
        value = getattr(step, name, None)
        if value is None:
            continue
        label, unit = _DERIVED.get(name, (field_label(name), ""))
        shown = format_quantity(value, unit)
        if name == "coverage_ml":
            if step.material:
                label = f"Nominal coverage of {formula(step.material)}"
            if step.coverage_uncertainty_ml is not None:
                shown = with_uncertainty(value, step.coverage_uncertainty_ml, "ML")
            if step.coverage_definition:
                shown += f" ({choice_label(step.coverage_definition)})"
        elif name == "rate_used_ml_per_min":
            if step.rate_origin == "calibration" and step.calibration_id:
                measured = lab_time(step.calibration.measured_at) if step.calibration else ""
                shown += f", from the calibration of {measured}"
            elif step.rate_origin == "step":
                shown += ", as typed"
        elif name == "pressure_mbar_corrected" and step.gas:
            label = f"True {formula(step.gas)} pressure"
        lines.append(ValueLine(label, shown))
    # A field the kind derives when it was not typed (an anneal temperature from a
    # thermocouple voltage) is a derived value too.
    for name in kind.derived_fields:
        if name in kind.fields and name not in step.raw_input:
            value = getattr(step, name, None)
            spec = kind.fields[name]
            if value is not None and isinstance(spec, Measure):
                source = step.temperature_source if name == "temperature_k" else ""
                label = f"{field_label(name)} from the {source}" if source else field_label(name)
                lines.append(ValueLine(label, show_value(value, spec.unit)))
    return lines


def step_view(step: PreparationStep, *, typed_only: bool = False) -> StepView:
    """A step's values and derived doses; ``typed_only`` leaves out the defaults applied to
    what was not typed (a timeline line stays short; the preparation page shows them all)."""
    kind = STEP_KINDS.get(step.kind)
    values: list[ValueLine] = []
    if kind is not None:
        for name, spec in kind.fields.items():
            if name in kind.derived_fields and name not in step.raw_input:
                continue
            line = _field_line(step, name, spec)
            if line is None:
                continue
            default = as_input_text(getattr(spec, "default", None))
            if typed_only and (not line.typed or line.typed == default):
                continue
            values.append(line)
    return StepView(
        step=step,
        number=step.position + 1,
        label=kind.label if kind else step.kind,
        values=values,
        derived=_derived_lines(step),
    )


def saved_message(preparation: Preparation) -> str:
    """The message after saving: what was logged and every dose derived from it."""
    steps = list(preparation.steps.order_by("position").select_related("calibration"))
    derived = []
    for step in steps:
        lines = _derived_lines(step)
        if lines:
            values = ", ".join(
                f"{line.label[0].lower()}{line.label[1:]} {line.value}" for line in lines
            )
            derived.append(f"step {step.position + 1} ({step.get_kind_display()}): {values}")
    count = f"{len(steps)} step{'s' if len(steps) != 1 else ''}"
    head = (
        f"Preparation of {preparation.sample} on {preparation.instrument} logged "
        f"({count}, started {lab_time(preparation.started_at)})."
    )
    return f"{head} Derived — {'; '.join(derived)}." if derived else head


@dataclass
class HistoryView:
    at: datetime
    kind: str
    record: Preparation | Transfer
    steps: list[StepView] = field(default_factory=list)


def _history_entry(entry: queries.HistoryEntry) -> HistoryView:
    view = HistoryView(at=entry.at, kind=entry.kind, record=entry.record)
    if entry.kind == "preparation":
        view.steps = [step_view(step, typed_only=True) for step in entry.record.steps.all()]
    return view


@dataclass
class SurfaceView:
    state: queries.SurfaceState
    coverages: list[str]
    exposures: list[str]
    anneal_time: str
    steps: list[StepView]


def _coverage_text(coverage: queries.Coverage) -> str:
    amount = format_quantity(coverage.coverage_ml, "ML")
    if coverage.uncertainty_ml is not None:
        amount = with_uncertainty(coverage.coverage_ml, coverage.uncertainty_ml, "ML")
    definition = choice_label(coverage.definition) if coverage.definition else ""
    text = f"{formula(coverage.material)} {amount}"
    return f"{text} ({definition})" if definition else text


def _surface_view(state: queries.SurfaceState) -> SurfaceView:
    return SurfaceView(
        state=state,
        coverages=[_coverage_text(c) for c in state.coverages],
        exposures=[
            f"{formula(gas)} {format_quantity(langmuir, 'L')}"
            for gas, langmuir in sorted(state.exposures_langmuir.items())
        ],
        anneal_time=duration_text(state.anneal_time_s) if state.anneal_time_s else "",
        steps=[step_view(step, typed_only=True) for step in state.steps],
    )


@dataclass
class SampleRow:
    sample: Sample
    state: SurfaceView
    last: Preparation | None


def _sample_row(sample: Sample, now: datetime) -> SampleRow:
    state = queries.surface_state(sample, now)
    # The last preparation holds the last step, which is the cleaning step or comes after it.
    if state.steps:
        last = state.steps[-1].preparation
    else:
        last = state.cleaning_step.preparation if state.cleaning_step else None
    return SampleRow(sample=sample, state=_surface_view(state), last=last)


def _planned(spec: Any, name: str, raw: Any) -> Any:
    """A template value in canonical form, to compare a recipe with what was typed."""
    if raw is None or (isinstance(raw, str) and not raw.strip()):
        return spec.default
    if isinstance(spec, Measure):
        try:
            return round(parse_quantity(raw, spec.unit, field=name), 12)
        except ScienceInputError:
            return str(raw).strip()
    if isinstance(spec, Reference):
        return str(raw).strip()
    return str(raw).strip().lower()


def _truthy(value: Any, default: bool) -> bool:
    if value is None:
        return default
    if isinstance(value, bool):
        return value
    return str(value).strip().lower() in {"1", "true", "yes", "on", "y"}


def _recipe_changes(preparation: Preparation, steps: list[PreparationStep]) -> list[str] | None:
    """How what was typed differs from the recipe followed ([] when not at all, None without
    a recipe): months later the reader sees at once whether the recipe was kept."""
    recipe = preparation.recipe
    if recipe is None:
        return None
    changes: list[str] = []
    planned = list(recipe.steps)
    for index in range(max(len(planned), len(steps))):
        number = index + 1
        if index >= len(planned):
            changes.append(f"step {number} ({steps[index].get_kind_display()}) added")
            continue
        kind_name = str(planned[index].get("kind", ""))
        kind = STEP_KINDS.get(kind_name)
        label = kind.label if kind else kind_name
        if index >= len(steps):
            changes.append(f"the recipe's step {number} ({label}) left out")
            continue
        step = steps[index]
        if step.kind != kind_name or kind is None:
            changes.append(f"step {number}: {step.get_kind_display()} instead of {label}")
            continue
        for name, spec in kind.fields.items():
            wanted = _planned(spec, name, planned[index].get(name))
            typed = _planned(spec, name, step.raw_input.get(name))
            if wanted != typed:
                was = planned[index].get(name)
                now = step.raw_input.get(name)
                changes.append(
                    f"step {number} ({label}) {field_label(name).lower()}: "
                    f"{'—' if was in (None, '') else was} → {'—' if now in (None, '') else now}"
                )
        planned_cleans = _truthy(planned[index].get("cleans"), kind.cleans_by_default)
        if planned_cleans != step.cleans:
            cleans = "leaves the surface clean" if step.cleans else "no longer a cleaning step"
            changes.append(f"step {number} ({label}) {cleans}")
    return changes
