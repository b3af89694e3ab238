"""Request and answer shapes of the samples API (DESIGN.md §4).

Numbers in requests may be numbers in the unit the field name carries or strings with a unit
("1 keV", "15 min"); answers always carry the canonical unit of the name. Step objects are
free-form in requests (``labbook.samples.steps`` validates them, so the API, the chamber-PC
page and the recipes read a step the same way); their answer shapes are generated from the
same step-kind table, so a new step kind appears here without editing this file.
"""

from __future__ import annotations

import contextlib
import operator
from datetime import datetime
from functools import reduce
from typing import Annotated, Any, Literal

from django.core.exceptions import FieldDoesNotExist
from ninja import Schema
from ninja.errors import ValidationError as RequestInvalid
from pydantic import (
    Field,
    create_model,
)

from labbook.core.schemas import AwareTime, quantity
from labbook.samples.models import (
    DepositionSource,
    Location,
    PreparationStep,
    RateCalibration,
    Recipe,
)
from labbook.samples.queries import SurfaceState
from labbook.samples.steps import STEP_KINDS, Choice, Measure, Reference
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity

# --- field types ------------------------------------------------------------------------------


def _step_kinds_help() -> str:
    lines = ["A step: `kind` and its fields (numbers in the field's unit or strings with units)."]
    for kind in STEP_KINDS.values():
        lines.append(f"- `{kind.name}`: {', '.join(kind.fields)}; also `cleans`, `notes`")
    return "\n".join(lines)


Duration = quantity("s", positive=True)
CoverageMl = quantity("ML", non_negative=True)
AreaDensity = quantity("1/cm^2", positive=True)

StepIn = Annotated[dict[str, Any], Field(description=_step_kinds_help())]

# --- samples and transfers ----------------------------------------------------------------------


class SampleIn(Schema):
    name: str = Field(min_length=1, max_length=100)
    substrate: str = Field(min_length=1, max_length=50, description="e.g. Cu(111)")
    identifier: str = ""
    supplier: str = ""
    supplier_lot: str = ""
    notes: str = ""
    monolayer_density_per_cm2: AreaDensity | None = None


class SampleOut(Schema):
    id: int
    name: str
    substrate: str
    material: str
    facet: str
    identifier: str
    supplier: str
    supplier_lot: str
    monolayer_density_per_cm2: float | None
    notes: str
    created_at: datetime
    retired_at: datetime | None


class TransferIn(Schema):
    location: Location
    at: AwareTime
    instrument: int | None = None
    notes: str = ""


class TransferOut(Schema):
    id: int
    sample: int = Field(alias="sample_id")
    at: datetime
    location: str
    instrument: int | None = Field(None, alias="instrument_id")
    moved_by: int | None = Field(None, alias="moved_by_id")
    notes: str


# --- steps as logged --------------------------------------------------------------------------

# Derived quantities that are not plain numbers in the unit their name carries.
_DERIVED_FIELDS: dict[str, tuple[Any, Any]] = {
    "calibration": (int | None, Field(None, description="id of the rate calibration used")),
    "rate_origin": (str, Field("", description="step (rate given) or calibration")),
}


def _step_field(spec: Any) -> tuple[Any, Any]:
    if isinstance(spec, Measure):
        return (float | None, Field(None, description=f"in {spec.unit}"))
    if isinstance(spec, Reference):
        return (int | None, Field(None, description="the id of the record"))
    if isinstance(spec, Choice):
        return (str, Field("", description=f"one of {', '.join(spec.choices)}; blank if not given"))
    return (str, "")


def _step_out_model(kind) -> type[Schema]:
    fields: dict[str, Any] = {
        "id": (int, ...),
        "position": (int, Field(..., description="0 for the first step")),
        "kind": (Literal[kind.name], ...),
        "cleans": (bool, ...),
        "notes": (str, ""),
    }
    for name, spec in kind.fields.items():
        fields[name] = _step_field(spec)
    for name in kind.derived_fields:
        if name not in fields:
            fields[name] = _DERIVED_FIELDS.get(
                name, (float | None, Field(None, description="derived when the step was logged"))
            )
    fields["raw_input"] = (
        dict[str, Any],
        Field(default_factory=dict, description="the values as sent, before unit conversion"),
    )
    return create_model(f"{kind.name.capitalize()}StepOut", __base__=Schema, **fields)


STEP_OUT_MODELS = {name: _step_out_model(kind) for name, kind in STEP_KINDS.items()}
# One answer shape per kind, told apart by ``kind`` (a new kind joins the union by itself).
StepOut = Annotated[reduce(operator.or_, STEP_OUT_MODELS.values()), Field(discriminator="kind")]


def _attribute(name: str) -> str:
    """The model attribute holding ``name``: the id column for a reference (``source_id``)."""
    try:
        return PreparationStep._meta.get_field(name).attname
    except FieldDoesNotExist:
        return name


def step_out(step: PreparationStep) -> dict[str, Any]:
    """A logged step in the shape of its kind: every field of the kind, canonical units."""
    model = STEP_OUT_MODELS[step.kind]
    data = {name: getattr(step, _attribute(name), None) for name in model.model_fields}
    data["raw_input"] = step.raw_input or {}
    return data


# --- preparations ---------------------------------------------------------------------------------


class PreparationIn(Schema):
    sample: int
    instrument: int
    started_at: AwareTime
    ended_at: AwareTime | None = None
    recipe: int | None = Field(None, description="the recipe version followed")
    operator: int | None = Field(None, description="user id; the caller when not given")
    notes: str = ""
    steps: list[StepIn] | None = Field(
        None, description="the values actually used; leave out to follow the recipe unchanged"
    )


class PreparationOut(Schema):
    id: int
    sample: int = Field(alias="sample_id")
    instrument: int = Field(alias="instrument_id")
    operator: int = Field(alias="operator_id")
    recipe: int | None = Field(None, alias="recipe_id")
    started_at: datetime
    ended_at: datetime | None
    notes: str
    created_at: datetime
    steps: list[StepOut]

    @staticmethod
    def resolve_steps(obj) -> list[dict[str, Any]]:
        # .all() reads the prefetched steps (ordered by position) without a query.
        return [step_out(step) for step in obj.steps.all()]


# --- surface state and history ------------------------------------------------------------------


class CoverageOut(Schema):
    material: str
    coverage_ml: float
    uncertainty_ml: float | None = Field(
        description="root-sum-square of the steps' uncertainties; null when a step had none"
    )
    definition: str


class SurfaceStateOut(Schema):
    at: datetime
    cleaned_at: datetime | None = Field(description="start of the preparation that cleaned it")
    is_clean: bool
    coverages: list[CoverageOut]
    exposures_langmuir: dict[str, float] = Field(
        description="gas → exposure since cleaning, at the gauge-corrected (true) pressure"
    )
    anneal_time_s: float
    steps_since_cleaning: int
    preparations: list[int] = Field(description="ids of the preparations since cleaning")

    @staticmethod
    def resolve_steps_since_cleaning(obj: SurfaceState) -> int:
        return len(obj.steps)

    @staticmethod
    def resolve_preparations(obj: SurfaceState) -> list[int]:
        return [preparation.pk for preparation in obj.preparations]


class PreparationEntry(Schema):
    at: datetime
    kind: Literal["preparation"]
    preparation: PreparationOut
    surface_state: SurfaceStateOut = Field(description="the surface right after it")


class TransferEntry(Schema):
    at: datetime
    kind: Literal["transfer"]
    transfer: TransferOut


class HistoryOut(Schema):
    sample: SampleOut
    entries: list[Annotated[PreparationEntry | TransferEntry, Field(discriminator="kind")]]
    surface_state: SurfaceStateOut


# --- recipes --------------------------------------------------------------------------------------


class RecipeIn(Schema):
    name: str = Field(min_length=1, max_length=100)
    description: str = ""
    substrate: str = ""
    steps: list[StepIn]


class RevisionIn(Schema):
    """What changes; a field left out stays as in the version revised."""

    steps: list[StepIn] | None = None
    description: str | None = None
    substrate: str | None = None


def canonical_template(step: dict[str, Any]) -> dict[str, Any]:
    """A recipe's step with its numbers in the unit each name carries.

    Recipes keep their steps as typed ("1 keV") so that following one logs exactly that; the
    answer converts the numbers so a script never has to parse units. The steps were checked
    when the recipe was saved, so a conversion that fails keeps the value as given.
    """
    kind = STEP_KINDS.get(step.get("kind", ""))
    if kind is None:
        return dict(step)
    out: dict[str, Any] = {}
    for name, value in step.items():
        spec = kind.fields.get(name)
        if isinstance(spec, Measure) and value is not None and value != "":
            with contextlib.suppress(ScienceInputError):
                value = parse_quantity(value, spec.unit, field=name)
        out[name] = value
    return out


class RecipeOut(Schema):
    id: int
    name: str
    version: int
    description: str
    substrate: str
    steps: list[dict[str, Any]] = Field(description="the template steps, canonical units")
    steps_as_given: list[dict[str, Any]]
    previous: int | None = Field(None, alias="previous_id", description="the version before")
    newest: bool
    created_by: int | None = Field(None, alias="created_by_id")
    created_at: datetime
    retired_at: datetime | None

    @staticmethod
    def resolve_steps(obj: Recipe) -> list[dict[str, Any]]:
        return [canonical_template(step) for step in obj.steps]

    @staticmethod
    def resolve_steps_as_given(obj: Recipe) -> list[dict[str, Any]]:
        return list(obj.steps)

    @staticmethod
    def resolve_newest(obj: Recipe) -> bool:
        # Read from select_related("next_version"): no query per recipe.
        return getattr(obj, "next_version", None) is None


# --- deposition sources and calibrations ------------------------------------------------------

RateModel = Literal["constant", "proportional", "arrhenius"]
CoverageDefinition = Literal[STEP_KINDS["deposit"].fields["coverage_definition"].choices]  # type: ignore[valid-type]
# The setting a calibration is fitted against is what a deposit step gives for that model.
_SETTING_UNITS = {"proportional": "A", "arrhenius": "K"}


class CalibrationPointIn(Schema):
    setting: float | str | None = Field(
        None, description="flux current in A (proportional) or source temperature in K (arrhenius)"
    )
    duration_s: Duration
    coverage_ml: CoverageMl


class CalibrationIn(Schema):
    points: list[CalibrationPointIn] = Field(min_length=1)
    measured_at: AwareTime
    model: RateModel = "constant"
    method: RateCalibration.Method = RateCalibration.Method.STM_AREA_FRACTION
    coverage_definition: CoverageDefinition = "substrate_atom"
    notes: str = ""

    def points_in_units(self) -> list[dict[str, float | None]]:
        """The points with each setting in the unit its model needs; ``RequestInvalid`` names
        every bad ``points.N.setting``."""
        unit = _SETTING_UNITS.get(self.model)
        points, errors = [], []
        for index, point in enumerate(self.points):
            setting = None
            if unit is not None and point.setting in (None, ""):
                message = f"a {self.model} calibration needs the setting in {unit}"
                errors.append({"loc": ("body", "points", index, "setting"), "msg": message})
            elif unit is not None:
                try:
                    setting = parse_quantity(point.setting, unit, field="setting")
                except ScienceInputError as exc:
                    message = str(exc).removeprefix("setting: ")
                    errors.append({"loc": ("body", "points", index, "setting"), "msg": message})
            points.append(
                {
                    "setting": setting,
                    "duration_s": point.duration_s,
                    "coverage_ml": point.coverage_ml,
                }
            )
        if errors:
            raise RequestInvalid(errors)
        return points


class CalibrationOut(Schema):
    id: int
    source: int = Field(alias="source_id")
    measured_at: datetime
    model: str
    method: str
    coverage_definition: str
    rate_ml_per_min: float = Field(description="at the reference setting")
    uncertainty_ml_per_min: float = Field(description="standard uncertainty (1σ)")
    reference_setting: float | None
    parameters: list[float]
    covariance: list[list[float]]
    residual_std: float
    points: list[dict[str, Any]]
    notes: str


class SourceIn(Schema):
    instrument: int
    name: str = Field(min_length=1, max_length=100)
    material: str = Field(min_length=1, max_length=100)
    kind: DepositionSource.Kind = DepositionSource.Kind.KNUDSEN_CELL
    notes: str = ""


class SourceOut(Schema):
    id: int
    instrument: int = Field(alias="instrument_id")
    name: str
    material: str
    kind: str
    notes: str
    calibration: CalibrationOut | None = Field(
        None, description="the newest calibration, used by deposits logged from now on"
    )

    @staticmethod
    def resolve_calibration(obj: DepositionSource) -> RateCalibration | None:
        # Prefetched newest first into ``current_calibrations`` by the router.
        calibrations = getattr(obj, "current_calibrations", None)
        if calibrations is None:
            calibrations = list(
                obj.calibrations.filter(retired_at__isnull=True).order_by("-measured_at")[:1]
            )
        return calibrations[0] if calibrations else None
