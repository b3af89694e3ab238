"""Preparation step kinds: the fields each kind takes, their units and plausible ranges, and the
derived quantities computed for it by ``labbook.science``.

No Django here: ``normalise_step`` takes what a person or a script sent (numbers in the unit
the field names, or strings with any unit pint reads) and returns the canonical values, the
derived quantities and the raw input, or raises ``StepErrors`` naming every bad field at once.
The samples actions store the result; the API, the chamber-PC page, the CSV import and the
recipes all go through here, so a step means the same thing wherever it was typed.

To add a step kind: add a ``StepKind`` to ``STEP_KINDS`` with its fields, and a derive function
that calls the science library; then the model columns and a migration (DEVELOPERS.md).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from labbook.science import beams, deposition, thermometry, vacuum
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity

#: Chamber temperature for impingement when none is logged: a room-temperature chamber wall.
DEFAULT_CHAMBER_TEMPERATURE_K = 295.0
#: Gauges are calibrated for nitrogen unless the channel says otherwise.
DEFAULT_GAUGE_GAS = "N2"

SECONDS_PER_WEEK = 7 * 24 * 3600.0


@dataclass(frozen=True)
class Measure:
    """A numeric field: its canonical unit and the range a plausible value lies in.

    The ranges are what a UHV preparation can physically be (common practice, no source):
    they catch a typed unit slip (15 A instead of 15 µA, 1 bar instead of 1e-6 mbar) without
    second-guessing an unusual but real preparation.
    """

    unit: str
    minimum: float | None = None
    maximum: float | None = None
    minimum_inclusive: bool = False
    required: bool = False
    default: float | None = None
    hint: str = ""


@dataclass(frozen=True)
class Choice:
    choices: tuple[str, ...]
    required: bool = False
    default: str | None = None


@dataclass(frozen=True)
class Text:
    required: bool = False
    default: str = ""
    max_length: int = 200


@dataclass(frozen=True)
class Reference:
    """The id of another record (a deposition source); the action resolves it."""

    required: bool = False
    default: int | None = None


FieldSpec = Measure | Choice | Text | Reference

# --- shared field specs -----------------------------------------------------------------------

DURATION = Measure("s", 0.0, SECONDS_PER_WEEK, required=True, hint="longer than a week")
# UHV step pressures: above 1 mbar is not a preparation step but a vented chamber.
UHV_PRESSURE = Measure("mbar", 0.0, 1.0, hint="a UHV step runs below 1 mbar")
TEMPERATURE = Measure("K", 0.0, 3500.0, hint="hotter than any crystal survives")
GAS = Text(max_length=20)

THERMOCOUPLE_TYPES = tuple(sorted(thermometry.THERMOCOUPLE_TYPES))
ANNEAL_METHODS = ("resistive", "electron_beam", "direct_current", "radiative", "laser", "other")

COMMON_FIELDS: dict[str, FieldSpec] = {
    "notes": Text(max_length=2000),
}


@dataclass(frozen=True)
class StepKind:
    name: str
    label: str
    fields: dict[str, FieldSpec]
    derive: Callable[[dict[str, Any], StepContext], dict[str, Any]]
    cleans_by_default: bool = False
    derived_fields: tuple[str, ...] = ()


@dataclass(frozen=True)
class StepContext:
    """What a step's derivation may need beyond its own fields."""

    sensitivities: Mapping[str, float] | None = None
    #: ``calibration_for(source_id)`` -> (science RateCalibration, calibration id) or None.
    calibration_for: Callable[[int], tuple[deposition.RateCalibration, int] | None] | None = None


@dataclass
class NormalisedStep:
    kind: str
    values: dict[str, Any]
    derived: dict[str, Any]
    raw: dict[str, Any]
    cleans: bool
    notes: str = ""

    def as_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "cleans": self.cleans,
            "notes": self.notes,
            **self.values,
            **self.derived,
        }


@dataclass
class StepErrors(Exception):  # noqa: N818 - a collection of field errors, raised as one
    """Every field error of a step (or of several steps), as ``{field: message}``."""

    errors: dict[str, str] = field(default_factory=dict)

    def __str__(self) -> str:
        return "; ".join(f"{name}: {message}" for name, message in self.errors.items())

    def prefixed(self, prefix: str) -> StepErrors:
        return StepErrors({f"{prefix}.{name}": message for name, message in self.errors.items()})


# --- derivations (each calls the science library; nothing is computed here) -----------------


def _derive_sputter(values: dict[str, Any], context: StepContext) -> dict[str, Any]:
    fluence = beams.ion_fluence_per_cm2(
        values["current_a"],
        values["duration_s"],
        values["beam_area_cm2"],
        secondary_electron_yield=values.get("secondary_electron_yield") or 0.0,
    )
    derived: dict[str, Any] = {"fluence_per_cm2": fluence}
    if values.get("pressure_mbar") is not None:
        derived["pressure_mbar_corrected"] = vacuum.true_pressure(
            values["pressure_mbar"], values["gas"], values["gauge_gas"], context.sensitivities
        )
    return derived


def _derive_anneal(values: dict[str, Any], context: StepContext) -> dict[str, Any]:
    source = values.get("temperature_source")
    if source == "thermocouple":
        temperature = thermometry.temperature_from_emf(
            values["thermocouple_mv"],
            values["thermocouple_type"],
            values.get("cold_junction_c") or 0.0,
        )
        return {"temperature_k": temperature}
    return {}


def _derive_deposit(values: dict[str, Any], context: StepContext) -> dict[str, Any]:
    duration = values["duration_s"]
    if values.get("rate_ml_per_min") is not None:
        coverage = deposition.coverage_ml(values["rate_ml_per_min"], duration)
        return {
            "coverage_ml": coverage,
            "coverage_uncertainty_ml": None,
            "rate_used_ml_per_min": values["rate_ml_per_min"],
            "rate_origin": "step",
            "calibration": None,
        }
    found = context.calibration_for(values["source"]) if context.calibration_for else None
    if found is None:
        raise StepErrors(
            {"source": "this source has no rate calibration yet; give rate_ml_per_min"}
        )
    calibration, calibration_id = found
    setting = None
    if calibration.model == "arrhenius":
        setting = values.get("source_temperature_k")
        if setting is None:
            raise StepErrors(
                {"source_temperature_k": "the source's calibration depends on its temperature"}
            )
    elif calibration.model == "proportional":
        setting = values.get("flux_current_a")
        if setting is None:
            raise StepErrors(
                {"flux_current_a": "the source's calibration scales with the flux current"}
            )
    rate, rate_uncertainty = calibration.predict(setting)
    coverage, coverage_uncertainty = calibration.predict_coverage(duration, setting)
    return {
        "coverage_ml": coverage,
        "coverage_uncertainty_ml": coverage_uncertainty,
        "rate_used_ml_per_min": rate,
        "rate_origin": "calibration",
        "calibration": calibration_id,
    }


def _derive_dose(values: dict[str, Any], context: StepContext) -> dict[str, Any]:
    indicated = values["pressure_mbar"]
    duration = values["duration_s"]
    true = vacuum.true_pressure(
        indicated, values["gas"], values["gauge_gas"], context.sensitivities
    )
    return {
        "exposure_langmuir": vacuum.exposure_langmuir(indicated, duration),
        "exposure_langmuir_corrected": vacuum.exposure_langmuir(true, duration),
        "pressure_mbar_corrected": true,
        "impingement_per_cm2": vacuum.impingement_per_cm2(
            true, duration, values["gas"], values["chamber_temperature_k"]
        ),
    }


def _derive_nothing(values: dict[str, Any], context: StepContext) -> dict[str, Any]:
    return {}


STEP_KINDS: dict[str, StepKind] = {
    kind.name: kind
    for kind in (
        StepKind(
            "sputter",
            "Sputter",
            {
                "gas": Text(default="Ar", max_length=20),
                # Ion guns for surface cleaning run from ~50 eV to a few keV (common practice).
                "energy_ev": Measure(
                    "eV", 10.0, 10_000.0, required=True, hint="outside 10 eV to 10 keV"
                ),
                # Sample drain current, nA to tens of µA in practice (common practice).
                "current_a": Measure(
                    "A", 0.0, 1e-3, required=True, hint="above 1 mA: a unit slip?"
                ),
                "beam_area_cm2": Measure("cm^2", 0.0, 20.0, required=True),
                "pressure_mbar": UHV_PRESSURE,
                "gauge_gas": Text(default=DEFAULT_GAUGE_GAS, max_length=20),
                "duration_s": DURATION,
                "secondary_electron_yield": Measure(
                    "dimensionless", 0.0, 5.0, minimum_inclusive=True
                ),
            },
            _derive_sputter,
            derived_fields=("fluence_per_cm2", "pressure_mbar_corrected"),
        ),
        StepKind(
            "anneal",
            "Anneal",
            {
                "temperature_k": TEMPERATURE,
                "thermocouple_mv": Measure("mV", -20.0, 100.0, minimum_inclusive=True),
                "thermocouple_type": Choice(THERMOCOUPLE_TYPES),
                "cold_junction_c": Measure(
                    "degC", -50.0, 100.0, minimum_inclusive=True, default=0.0
                ),
                "pyrometer_emissivity": Measure("dimensionless", 0.0, 1.0),
                "heater_current_a": Measure("A", 0.0, 100.0, minimum_inclusive=True),
                "heater_power_w": Measure("W", 0.0, 5000.0, minimum_inclusive=True),
                "temperature_source": Choice(
                    ("given", "thermocouple", "pyrometer"), default="given"
                ),
                "duration_s": DURATION,
                "ramp_k_per_s": Measure("K/s", 0.0, 200.0, minimum_inclusive=True),
                "method": Choice(ANNEAL_METHODS),
            },
            _derive_anneal,
            derived_fields=("temperature_k",),
        ),
        StepKind(
            "deposit",
            "Deposit",
            {
                "material": Text(required=True, max_length=100),
                "duration_s": DURATION,
                "rate_ml_per_min": Measure("ML/min", 0.0, 1000.0, minimum_inclusive=True),
                "source": Reference(),  # a DepositionSource id, resolved by the action
                "source_temperature_k": TEMPERATURE,
                "flux_current_a": Measure("A", 0.0, 1e-3, minimum_inclusive=True),
                "sample_temperature_k": TEMPERATURE,
                "coverage_definition": Choice(
                    ("substrate_atom", "closed_layer", "molecules_per_nm2"),
                    default="substrate_atom",
                ),
            },
            _derive_deposit,
            derived_fields=(
                "coverage_ml",
                "coverage_uncertainty_ml",
                "rate_used_ml_per_min",
                "rate_origin",
                "calibration",
            ),
        ),
        StepKind(
            "dose",
            "Gas dose",
            {
                "gas": Text(required=True, max_length=20),
                "pressure_mbar": Measure(
                    "mbar", 0.0, 1.0, required=True, hint="a UHV step runs below 1 mbar"
                ),
                "duration_s": DURATION,
                "gauge_gas": Text(default=DEFAULT_GAUGE_GAS, max_length=20),
                "chamber_temperature_k": Measure(
                    "K", 0.0, 1000.0, default=DEFAULT_CHAMBER_TEMPERATURE_K
                ),
                "sample_temperature_k": TEMPERATURE,
            },
            _derive_dose,
            derived_fields=(
                "exposure_langmuir",
                "exposure_langmuir_corrected",
                "pressure_mbar_corrected",
                "impingement_per_cm2",
            ),
        ),
        StepKind(
            "other",
            "Other",
            {
                "description": Text(required=True, max_length=500),
                "duration_s": Measure("s", 0.0, SECONDS_PER_WEEK),
            },
            _derive_nothing,
        ),
    )
}


# --- normalisation -----------------------------------------------------------------------------


def _read_quantity(name: str, spec: Measure, raw: Any) -> float:
    value = parse_quantity(raw, spec.unit, field=name)
    if math.isnan(value) or math.isinf(value):
        raise ScienceInputError(f"{name} must be a finite number", argument=name)
    low_ok = spec.minimum is None or (
        value >= spec.minimum if spec.minimum_inclusive else value > spec.minimum
    )
    high_ok = spec.maximum is None or value <= spec.maximum
    if not low_ok:
        relation = "at least" if spec.minimum_inclusive else "more than"
        raise ScienceInputError(
            f"must be {relation} {spec.minimum:g} {spec.unit}, got {value:g}", argument=name
        )
    if not high_ok:
        why = f" ({spec.hint})" if spec.hint else ""
        raise ScienceInputError(
            f"must be at most {spec.maximum:g} {spec.unit}, got {value:g}{why}", argument=name
        )
    return value


def _read_field(name: str, spec: FieldSpec, raw: Any) -> Any:
    if isinstance(spec, Measure):
        return _read_quantity(name, spec, raw)
    if isinstance(spec, Reference):
        if isinstance(raw, bool) or not str(raw).strip().isdigit():
            raise ScienceInputError(f"must be the id of a record, got {raw!r}", argument=name)
        return int(str(raw).strip())
    text = str(raw).strip()
    if isinstance(spec, Choice):
        if text not in spec.choices:
            raise ScienceInputError(
                f"must be one of {', '.join(spec.choices)}; got {text!r}", argument=name
            )
        return text
    if len(text) > spec.max_length:
        raise ScienceInputError(f"is longer than {spec.max_length} characters", argument=name)
    return text


def _blank(value: Any) -> bool:
    return value is None or (isinstance(value, str) and value.strip() == "")


def normalise_step(data: Mapping[str, Any], context: StepContext | None = None) -> NormalisedStep:
    """Validate one step and compute its derived quantities; raises ``StepErrors``."""
    context = context or StepContext()
    kind_name = str(data.get("kind", "")).strip()
    kind = STEP_KINDS.get(kind_name)
    if kind is None:
        raise StepErrors(
            {"kind": f"unknown step kind {kind_name!r}; use one of {', '.join(STEP_KINDS)}"}
        )

    errors: dict[str, str] = {}
    allowed = {"kind", "cleans", *COMMON_FIELDS, *kind.fields}
    for name in data:
        if name not in allowed and name not in kind.derived_fields:
            article = "an" if kind_name[0] in "aeiou" else "a"
            errors[name] = f"is not a field of {article} {kind_name} step"

    values: dict[str, Any] = {}
    raw: dict[str, Any] = {}
    for name, spec in kind.fields.items():
        given = data.get(name)
        if _blank(given):
            if spec.required:
                errors[name] = "is required"
            elif spec.default is not None:
                values[name] = spec.default
            continue
        raw[name] = given
        try:
            values[name] = _read_field(name, spec, given)
        except ScienceInputError as exc:
            message = str(exc)
            # parse_quantity already names the field at the front; do not say it twice.
            errors[name] = message.removeprefix(f"{name}: ")

    for name in ("gas", "gauge_gas"):
        if name in values and name in kind.fields:
            try:
                values[name] = vacuum.normalize_gas(values[name], known=vacuum.CRC_SENSITIVITIES)
            except ScienceInputError as exc:
                errors[name] = str(exc)
                continue
            # Checked here, with the other fields, so one answer names every problem: the
            # derivations need the gas's gauge sensitivity (and its mass for impingement).
            if values[name] not in vacuum.CRC_SENSITIVITIES:
                known = ", ".join(sorted(vacuum.CRC_SENSITIVITIES))
                errors[name] = f"unknown gas {values[name]!r}: the gauge table knows {known}"

    if kind_name == "anneal" and not errors:
        _check_anneal_temperature(values, errors)
    no_rate = values.get("rate_ml_per_min") is None and values.get("source") is None
    if kind_name == "deposit" and not errors and no_rate:
        errors["rate_ml_per_min"] = "give the rate, or a calibrated source"

    if errors:
        raise StepErrors(errors)

    try:
        derived = kind.derive(values, context)
    except ScienceInputError as exc:
        raise StepErrors({exc.argument or "kind": str(exc)}) from exc
    values.update({k: v for k, v in derived.items() if k in kind.fields})
    derived = {k: v for k, v in derived.items() if k not in kind.fields}

    cleans_raw = data.get("cleans")
    cleans = kind.cleans_by_default if cleans_raw is None else _truthy(cleans_raw)
    notes = str(data.get("notes") or "").strip()
    return NormalisedStep(
        kind=kind_name, values=values, derived=derived, raw=raw, cleans=cleans, notes=notes
    )


def _check_anneal_temperature(values: dict[str, Any], errors: dict[str, str]) -> None:
    """An anneal's temperature is given, or read from a thermocouple EMF, or a pyrometer.

    The raw reading is always kept; the temperature is derived from it only where a
    reference function exists (thermocouples). A heater current alone gives no temperature.
    """
    has_emf = values.get("thermocouple_mv") is not None
    if has_emf:
        if values.get("thermocouple_type") is None:
            errors["thermocouple_type"] = "a thermocouple voltage needs its type (K, N, J, …)"
            return
        if values.get("temperature_source") == "given":
            values["temperature_source"] = "thermocouple"
        if (
            values.get("temperature_k") is not None
            and values["temperature_source"] == "thermocouple"
        ):
            errors["temperature_k"] = "give the thermocouple voltage or the temperature, not both"
            return
        try:
            thermometry.temperature_from_emf(
                values["thermocouple_mv"],
                values["thermocouple_type"],
                values.get("cold_junction_c") or 0.0,
            )
        except ScienceInputError as exc:
            errors["thermocouple_mv"] = str(exc)
        return
    if values.get("temperature_k") is None and values.get("heater_current_a") is None:
        errors["temperature_k"] = (
            "give the temperature, a thermocouple voltage, or the heater current"
        )


def _truthy(value: Any) -> bool:
    if isinstance(value, bool):
        return value
    return str(value).strip().lower() in {"1", "true", "yes", "on", "y"}


def normalise_steps(
    steps: list[Mapping[str, Any]], context: StepContext | None = None
) -> list[NormalisedStep]:
    """All steps, or ``StepErrors`` with every bad field of every step (``steps.2.energy_ev``)."""
    if not steps:
        raise StepErrors({"steps": "a preparation needs at least one step"})
    normalised: list[NormalisedStep] = []
    errors: dict[str, str] = {}
    for index, step in enumerate(steps):
        if not isinstance(step, Mapping):
            errors[f"steps.{index}"] = "must be an object with a kind"
            continue
        try:
            normalised.append(normalise_step(step, context))
        except StepErrors as exc:
            errors.update(exc.prefixed(f"steps.{index}").errors)
    if errors:
        raise StepErrors(errors)
    return normalised
