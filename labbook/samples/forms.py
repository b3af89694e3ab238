"""Forms of the samples pages.

The preparation log is built from ``STEP_KINDS``: a step row has one input per field of its
kind, in the kind's order, so a new step kind (DEVELOPERS.md) appears on the chamber-PC page by
itself. Nothing here converts a unit or checks a range: the rows hand what was typed, as typed,
to ``record_preparation``, and the ``StepErrors`` it raises are mapped back onto the inputs.
"""

from __future__ import annotations

import re
import secrets
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from django import forms
from django.conf import settings
from django.core.exceptions import ValidationError
from django.utils import timezone

from labbook.samples.models import Sample
from labbook.samples.steps import STEP_KINDS, Choice, FieldSpec, Measure, Reference, Text

# --- how step fields read on the page ---------------------------------------------------------

# Our own labels for the fields the step kinds have today. A field of a new kind that is not
# listed still gets a label, made from its name (``_fallback_label``).
_LABELS = {
    "gas": "Gas",
    "energy_ev": "Ion energy",
    "current_a": "Ion current",
    "beam_area_cm2": "Beam area",
    "pressure_mbar": "Gauge pressure",
    "gauge_gas": "Gauge calibrated for",
    "duration_s": "Duration",
    "secondary_electron_yield": "Secondary-electron yield γ",
    "temperature_k": "Temperature",
    "thermocouple_mv": "Thermocouple voltage",
    "thermocouple_type": "Thermocouple type",
    "cold_junction_c": "Reference junction at",
    "pyrometer_emissivity": "Pyrometer emissivity",
    "heater_current_a": "Heater current",
    "heater_power_w": "Heater power",
    "temperature_source": "Temperature from",
    "ramp_k_per_s": "Ramp",
    "method": "Heating",
    "material": "Material",
    "rate_ml_per_min": "Rate",
    "source": "Calibrated source",
    "source_temperature_k": "Source temperature",
    "flux_current_a": "Flux current",
    "sample_temperature_k": "Sample temperature",
    "coverage_definition": "1 ML counts",
    "chamber_temperature_k": "Chamber temperature",
    "description": "What was done",
}

_HINTS = {
    "current_a": "the sample (drain) current",
    "pressure_mbar": "as the gauge reads it",
    "thermocouple_mv": "raw reading; the temperature is worked out from it",
    "rate_ml_per_min": "or choose a calibrated source",
    "source": "its calibration at the time gives the rate",
}

# Fields people seldom change: they sit behind "More" so the tab order stays short. A kind or
# field not listed here is shown in the open.
_SECONDARY = {
    "sputter": {"gauge_gas", "secondary_electron_yield"},
    "anneal": {
        "cold_junction_c",
        "pyrometer_emissivity",
        "heater_power_w",
        "temperature_source",
        "ramp_k_per_s",
    },
    "deposit": {"coverage_definition"},
    "dose": {"gauge_gas", "chamber_temperature_k"},
}

_CHOICE_LABELS = {
    "electron_beam": "electron beam",
    "direct_current": "direct current",
    "given": "the temperature typed",
    "thermocouple": "the thermocouple voltage",
    "substrate_atom": "one per substrate atom",
    "closed_layer": "one closed layer",
    "molecules_per_nm2": "molecules per nm²",
}

# How a canonical unit is written next to its input.
_UNIT_SHOWN = {"cm^2": "cm²", "degC": "°C", "dimensionless": ""}

# An example of what may be typed, by canonical unit (the unit suffix says what a bare
# number means).
_EXAMPLES = {
    "eV": "1 keV",
    "A": "5 uA",
    "s": "15 min",
    "mbar": "2e-6 mbar",
    "K": "800 K",
    "mV": "20.6 mV",
    "ML/min": "0.2 ML/min",
    "cm^2": "1 cm^2",
    "W": "15 W",
    "K/s": "1 K/s",
    "degC": "20 degC",
}
_FIELD_EXAMPLES = {
    "flux_current_a": "20 nA",
    "heater_current_a": "2.5 A",
    "sample_temperature_k": "300 K",
    "source_temperature_k": "650 K",
    "chamber_temperature_k": "295 K",
}

_UNIT_SUFFIXES = re.compile(r"_(per_cm2|ml_per_min|k_per_s|cm2|mbar|ev|mv|a|v|k|s|c|w|ml|hz|m)$")
# pint's dimension formula at the end of a conversion error means little at the chamber.
_DIMENSION_NOTE = re.compile(r"\s*\(expected a quantity of dimension [^)]*\)\s*$")


def _fallback_label(name: str) -> str:
    return _UNIT_SUFFIXES.sub("", name).replace("_", " ").strip().capitalize() or name


def field_label(name: str) -> str:
    """The label of a step field on the pages ('energy_ev' -> 'Ion energy')."""
    return _LABELS.get(name) or _fallback_label(name)


def unit_shown(unit: str) -> str:
    return _UNIT_SHOWN.get(unit, unit)


def choice_label(value: str) -> str:
    return _CHOICE_LABELS.get(value, value.replace("_", " "))


def _example(name: str, spec: FieldSpec) -> str:
    if not isinstance(spec, Measure):
        return ""
    return _FIELD_EXAMPLES.get(name) or _EXAMPLES.get(spec.unit, "")


def as_input_text(value: Any) -> str:
    """A template value as it goes into a text input: strings as typed, numbers plainly."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else ""
    if isinstance(value, float):
        if value.is_integer() and abs(value) < 1e15:
            return str(int(value))
        return repr(value)
    return str(value)


def readable_error(message: str, example: str = "") -> str:
    """A step error as it reads beside its input: without pint's dimension formula, with an
    example of what the field takes when the unit was the trouble."""
    text = _DIMENSION_NOTE.sub("", message)
    if example and text != message:
        text += f"; type e.g. {example}"
    return text


# --- step rows -----------------------------------------------------------------------------------


@dataclass
class FieldView:
    """One input of a step row, with everything the template needs to render it."""

    name: str
    prefix: str
    label: str
    widget: str  # "text" or "select"
    value: str = ""
    unit: str = ""
    placeholder: str = ""
    hint: str = ""
    example: str = ""
    required: bool = False
    secondary: bool = False
    choices: list[tuple[str, str]] = field(default_factory=list)
    default: str = ""
    error: str = ""
    autofocus: bool = False

    @property
    def html_name(self) -> str:
        return f"{self.prefix}-{self.name}"

    @property
    def id(self) -> str:
        return self.html_name

    @property
    def describedby(self) -> str:
        ids = []
        if self.unit:
            ids.append(f"{self.id}-unit")
        if self.hint:
            ids.append(f"{self.id}-hint")
        if self.error:
            ids.append(f"{self.id}-error")
        return " ".join(ids)


@dataclass
class StepRow:
    """One step of the preparation being logged, as shown and as posted back."""

    token: str
    kind: str
    fields: list[FieldView] = field(default_factory=list)
    cleans: bool = False
    notes: str = ""
    error: str = ""
    position: int = 0
    notes_error: str = ""

    @property
    def prefix(self) -> str:
        return f"steps-{self.token}"

    @property
    def label(self) -> str:
        kind = STEP_KINDS.get(self.kind)
        return kind.label if kind else self.kind

    @property
    def known(self) -> bool:
        return self.kind in STEP_KINDS

    @property
    def number(self) -> int:
        return self.position + 1

    @property
    def primary(self) -> list[FieldView]:
        return [f for f in self.fields if not f.secondary]

    @property
    def secondary(self) -> list[FieldView]:
        return [f for f in self.fields if f.secondary]

    @property
    def secondary_open(self) -> bool:
        return any(f.error for f in self.secondary)

    @property
    def secondary_summary(self) -> str:
        """What is set behind "More", so it reads without opening it."""
        parts = []
        for f in self.secondary:
            if f.value and f.value != f.default:
                shown = dict(f.choices).get(f.value, f.value) if f.choices else f.value
                parts.append(f"{f.label}: {shown}")
        return "; ".join(parts)

    @property
    def has_errors(self) -> bool:
        return bool(self.error or self.notes_error or any(f.error for f in self.fields))

    def as_step(self) -> dict[str, Any]:
        """The step as ``record_preparation`` takes it: every value as typed."""
        step: dict[str, Any] = {"kind": self.kind, "cleans": self.cleans, "notes": self.notes}
        for f in self.fields:
            step[f.name] = f.value
        return step

    def field_named(self, name: str) -> FieldView | None:
        return next((f for f in self.fields if f.name == name), None)


def new_token() -> str:
    """A row id for a row added on the page; unique, so a row added by htmx never takes the
    inputs of another one. Rows are saved in the order they appear in the form."""
    return secrets.token_hex(4)


def build_row(
    kind: str,
    template: Mapping[str, Any],
    *,
    token: str,
    sources: Iterable[tuple[int, str]] = (),
    autofocus: bool = False,
    from_template: bool = True,
) -> StepRow:
    """A step row of ``kind`` filled from ``template`` (a recipe step, a logged step as a
    template, or posted values). Defaults of the kind show as the placeholder of an empty input
    (and are applied when it is saved), except choices, which start on their default."""
    spec = STEP_KINDS.get(kind)
    row = StepRow(token=token, kind=kind, notes=as_input_text(template.get("notes", "")))
    cleans = template.get("cleans")
    if isinstance(cleans, str):
        cleans = cleans.strip().lower() in {"1", "true", "yes", "on", "y"}
    row.cleans = bool(spec.cleans_by_default if cleans is None and spec else cleans)
    if spec is None:
        row.error = f"unknown step kind {kind!r}"
        return row
    source_choices = [(str(pk), label) for pk, label in sources]
    for name, fspec in spec.fields.items():
        value = as_input_text(template.get(name))
        view = FieldView(
            name=name,
            prefix=row.prefix,
            label=field_label(name),
            widget="text",
            value=value,
            hint=_HINTS.get(name, ""),
            required=fspec.required,
            secondary=name in _SECONDARY.get(kind, ()),
            default=as_input_text(getattr(fspec, "default", None)),
        )
        if isinstance(fspec, Measure):
            view.unit = unit_shown(fspec.unit)
            view.example = _example(name, fspec)
            if fspec.default is not None:
                view.placeholder = f"default {as_input_text(fspec.default)} {view.unit}".strip()
            elif view.example:
                view.placeholder = f"e.g. {view.example}"
        elif isinstance(fspec, Choice):
            view.widget = "select"
            view.choices = [(c, choice_label(c)) for c in fspec.choices]
            if not fspec.required:
                view.choices.insert(0, ("", "—"))
            if not value and fspec.default is not None and from_template:
                view.value = fspec.default
        elif isinstance(fspec, Reference):
            view.widget = "select"
            view.choices = [("", "none (rate typed)"), *source_choices]
            if value and value not in {c for c, _ in view.choices}:
                # Keep a reference the list no longer offers (another instrument's source):
                # the save then says what is wrong with it instead of dropping it silently.
                view.choices.append((value, f"record #{value}"))
        elif isinstance(fspec, Text) and fspec.default:
            view.placeholder = f"default {fspec.default}"
        row.fields.append(view)
    if autofocus:
        # The first thing to type: the first field with neither a value nor a default (the
        # sputter gas defaults to Ar, so the energy), else the first field.
        empty = [f for f in row.primary if not f.value and not f.placeholder.startswith("default")]
        first = next(iter(empty or row.primary), None)
        if first is not None:
            first.autofocus = True
    return row


_TOKEN = re.compile(r"^steps-([a-z0-9]{1,16})-kind$")


def rows_from_post(
    data: Mapping[str, Any], *, sources: Iterable[tuple[int, str]] = ()
) -> list[StepRow]:
    """The step rows of a posted form, in the order the browser sent them (document order)."""
    sources = list(sources)
    rows: list[StepRow] = []
    for key in data:
        match = _TOKEN.match(key)
        if not match:
            continue
        token = match.group(1)
        prefix = f"steps-{token}-"
        values = {
            name.removeprefix(prefix): data.get(name, "")
            for name in data
            if name.startswith(prefix) and name != f"{prefix}cleans"
        }
        values["cleans"] = f"{prefix}cleans" in data
        kind = str(values.pop("kind", "")).strip()
        rows.append(build_row(kind, values, token=token, sources=sources, from_template=False))
    return number_rows(rows)


def number_rows(rows: list[StepRow]) -> list[StepRow]:
    for position, row in enumerate(rows):
        row.position = position
    return rows


def rows_from_template(
    steps: Iterable[Mapping[str, Any]], *, sources: Iterable[tuple[int, str]] = ()
) -> list[StepRow]:
    sources = list(sources)
    rows = [
        build_row(str(step.get("kind", "")), step, token=str(index), sources=sources)
        for index, step in enumerate(steps)
    ]
    return number_rows(rows)


_STEP_ERROR = re.compile(r"^steps\.(\d+)(?:\.(.+))?$")


def attach_errors(rows: list[StepRow], errors: Mapping[str, str]) -> dict[str, str]:
    """Put each ``steps.N.field`` error beside its input; return the errors that belong to no
    step (``steps``, ``ended_at`` …) for the form to show."""
    rest: dict[str, str] = {}
    for key, message in errors.items():
        match = _STEP_ERROR.match(key)
        if not match or int(match.group(1)) >= len(rows):
            rest[key] = message
            continue
        row = rows[int(match.group(1))]
        name = match.group(2)
        view = row.field_named(name) if name else None
        if view is not None:
            view.error = readable_error(message, view.example)
        elif name == "notes":
            row.notes_error = message
        else:
            label = f"{field_label(name)}: " if name and name != "kind" else ""
            row.error = f"{row.error} {label}{message}".strip()
    return rest


# --- the preparation's own fields -------------------------------------------------------------


def lab_zone() -> ZoneInfo:
    return ZoneInfo(settings.TIME_ZONE)


def lab_now_text() -> str:
    """Now, as a ``datetime-local`` input shows it, in the lab's zone."""
    return timezone.localtime(timezone.now(), lab_zone()).strftime("%Y-%m-%dT%H:%M")


class LabDateTimeField(forms.Field):
    """A date and time typed in the lab's zone (``2026-03-02T10:30`` from a datetime input,
    or ``2026-03-02 10:30`` typed), returned aware. An explicit offset is honoured."""

    # Logging ahead of the clock is a typo (a wrong day or month), not a plan.
    max_ahead = timedelta(hours=1)

    def to_python(self, value: Any) -> datetime | None:
        text = str(value or "").strip()
        if not text:
            return None
        try:
            parsed = datetime.fromisoformat(text)
        except ValueError as exc:
            raise ValidationError(
                "give the date and time as YYYY-MM-DD HH:MM", code="invalid"
            ) from exc
        if parsed.tzinfo is not None:
            return parsed
        zone = lab_zone()
        aware = parsed.replace(tzinfo=zone)
        # A wall-clock time skipped when the clocks go forward does not round-trip.
        if aware.astimezone(UTC).astimezone(zone).replace(tzinfo=None) != parsed:
            raise ValidationError(
                f"{text} does not exist in {zone.key}: the clocks skipped it", code="invalid"
            )
        return aware

    def validate(self, value: datetime | None) -> None:
        super().validate(value)
        if value is not None and value > timezone.now() + self.max_ahead:
            raise ValidationError("is later than now; check the day and the time", code="future")


class PreparationForm(forms.Form):
    """Where and when: the parts of a preparation that are not its steps."""

    instrument = forms.ModelChoiceField(
        queryset=None, error_messages={"required": "choose the instrument"}
    )
    sample = forms.ModelChoiceField(queryset=None, error_messages={"required": "choose the sample"})
    started_at = LabDateTimeField(error_messages={"required": "give the start time"})
    ended_at = LabDateTimeField(required=False)
    notes = forms.CharField(required=False, max_length=5000, strip=True)

    def __init__(self, *args: Any, instruments, samples, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.fields["instrument"].queryset = instruments
        self.fields["sample"].queryset = samples

    def raw(self, name: str) -> str:
        """What was typed into a field (for re-rendering it), or its initial value."""
        if self.is_bound:
            return str(self.data.get(name, "") or "")
        return str(self.initial.get(name, "") or "")


# --- a new sample ------------------------------------------------------------------------------


class SampleForm(forms.Form):
    name = forms.CharField(max_length=100, help_text="what the lab calls it, e.g. Cu(111) #3")
    substrate = forms.CharField(max_length=50, help_text="material and surface, e.g. Cu(111)")
    identifier = forms.CharField(
        max_length=100, required=False, help_text="serial or label on the holder"
    )
    supplier = forms.CharField(max_length=100, required=False)
    supplier_lot = forms.CharField(max_length=100, required=False, label="Supplier lot")
    notes = forms.CharField(required=False, widget=forms.Textarea)

    def clean_name(self) -> str:
        name = self.cleaned_data["name"].strip()
        if Sample.objects.filter(name=name).exists():
            raise ValidationError("a sample of this name exists already", code="unique")
        return name

    def add_action_errors(self, error: ValidationError) -> None:
        """Errors the action found (a name taken meanwhile), beside their fields."""
        if not hasattr(error, "error_dict"):
            self.add_error(None, error)
            return
        for name, problems in error.error_dict.items():
            target = name if name in self.fields else None
            for problem in problems:
                text = (
                    "a sample of this name exists already"
                    if problem.code == "unique"
                    else " ".join(problem.messages)
                )
                self.add_error(target, text)
