"""Every change to samples, recipes, sources and preparations: the one path that the API, the
chamber-PC page, the CSV import and the demo all call."""

from __future__ import annotations

import contextlib
from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Any

from django.core.exceptions import ValidationError
from django.db import IntegrityError, transaction

from labbook.accounts.permissions import require_manager, require_member
from labbook.core.records import save_record
from labbook.samples.models import (
    DepositionSource,
    Location,
    Preparation,
    PreparationStep,
    RateCalibration,
    Recipe,
    Sample,
    Transfer,
)
from labbook.samples.steps import StepContext, StepErrors, normalise_steps
from labbook.science import deposition, surfaces
from labbook.science.errors import ScienceInputError

_STEP_COLUMNS = {
    f.name for f in PreparationStep._meta.get_fields() if getattr(f, "concrete", False)
}


def _substrate_facts(substrate: str) -> dict[str, Any]:
    """Material, facet and monolayer density of a substrate the tables know; blanks otherwise
    (HOPG, an oxide, a thin film: the lab gives the density itself if it wants ML counted)."""
    try:
        parsed = surfaces.parse_substrate(substrate)
    except ScienceInputError:
        return {}
    facts: dict[str, Any] = {"material": parsed.element, "facet": parsed.facet}
    with contextlib.suppress(ScienceInputError):
        facts["monolayer_density_per_cm2"] = surfaces.monolayer_density_per_cm2(substrate)
    return facts


@transaction.atomic
def create_sample(
    *,
    name: str,
    substrate: str,
    identifier: str = "",
    supplier: str = "",
    supplier_lot: str = "",
    notes: str = "",
    monolayer_density_per_cm2: float | None = None,
    actor,
) -> Sample:
    require_member(actor)
    facts = _substrate_facts(substrate)
    if monolayer_density_per_cm2 is not None:
        facts["monolayer_density_per_cm2"] = monolayer_density_per_cm2
    sample = Sample(
        name=name,
        substrate=substrate,
        identifier=identifier,
        supplier=supplier,
        supplier_lot=supplier_lot,
        notes=notes,
        **facts,
    )
    return save_record(sample, actor)


@transaction.atomic
def transfer_sample(
    sample: Sample, *, location: str, at: datetime, instrument=None, notes: str = "", actor
) -> Transfer:
    require_member(actor)
    if location not in Location.values:
        raise ValidationError(
            {"location": f"unknown location {location!r}; use one of {', '.join(Location.values)}"}
        )
    transfer = Transfer(
        sample=sample, location=location, at=at, instrument=instrument, notes=notes, moved_by=actor
    )
    return save_record(transfer, actor)


# --- recipes ----------------------------------------------------------------------------------


def _check_template_steps(
    steps: Sequence[Mapping[str, Any]], instrument_id: int | None = None
) -> None:
    normalise_steps(list(steps), _context(instrument_id=instrument_id, at=None))


@transaction.atomic
def create_recipe(
    *,
    name: str,
    steps: Sequence[Mapping[str, Any]],
    description: str = "",
    substrate: str = "",
    actor,
) -> Recipe:
    require_member(actor)
    if Recipe.objects.filter(name=name).exists():
        raise ValidationError(
            {"name": f"a recipe named {name!r} exists; revise it to make a new version"}
        )
    _check_template_steps(steps)
    recipe = Recipe(
        name=name,
        version=1,
        description=description,
        substrate=substrate,
        steps=[dict(step) for step in steps],
        created_by=actor,
    )
    return save_record(recipe, actor)


@transaction.atomic
def revise_recipe(
    recipe: Recipe,
    *,
    steps: Sequence[Mapping[str, Any]] | None = None,
    description: str | None = None,
    substrate: str | None = None,
    actor,
) -> Recipe:
    """A new version of ``recipe``; the old version stays as it was for the preparations that
    followed it. Only the newest version can be revised (two people editing at once must not
    fork a recipe into two version 3s)."""
    require_member(actor)
    current = Recipe.objects.select_for_update().get(pk=recipe.pk)
    if hasattr(current, "next_version"):
        raise ValidationError(
            {"recipe": f"{current} has been revised already; revise its newest version"}
        )
    new_steps = [dict(step) for step in (steps if steps is not None else current.steps)]
    _check_template_steps(new_steps)
    revised = Recipe(
        name=current.name,
        version=current.version + 1,
        description=current.description if description is None else description,
        substrate=current.substrate if substrate is None else substrate,
        steps=new_steps,
        previous=current,
        created_by=actor,
    )
    return save_record(revised, actor)


# --- deposition sources and their calibrations -------------------------------------------------


@transaction.atomic
def add_deposition_source(
    instrument, *, name: str, material: str, kind: str = "knudsen_cell", notes: str = "", actor
) -> DepositionSource:
    require_manager(actor)
    return save_record(
        DepositionSource(
            instrument=instrument, name=name, material=material, kind=kind, notes=notes
        ),
        actor,
    )


@transaction.atomic
def record_calibration(
    source: DepositionSource,
    *,
    points: Sequence[Mapping[str, float | None]],
    measured_at: datetime,
    model: str = "constant",
    method: str = RateCalibration.Method.STM_AREA_FRACTION,
    coverage_definition: str = "substrate_atom",
    notes: str = "",
    actor,
) -> RateCalibration:
    """Fit the source's rate from measured coverages (least squares, with uncertainty) and
    store the fit with its points as evidence."""
    require_member(actor)
    triples = [(p.get("setting"), p["duration_s"], p["coverage_ml"]) for p in points]
    try:
        fit = deposition.fit_rate_calibration(triples, model=model)
    except ScienceInputError as exc:
        raise ValidationError({"points": str(exc)}) from exc
    calibration = RateCalibration(
        source=source,
        measured_at=measured_at,
        model=fit.model,
        method=method,
        coverage_definition=coverage_definition,
        rate_ml_per_min=fit.rate_ml_per_min,
        uncertainty_ml_per_min=fit.uncertainty_ml_per_min,
        reference_setting=fit.reference_setting,
        parameters=list(fit.parameters),
        covariance=[list(row) for row in fit.covariance],
        residual_std=fit.residual_std,
        points=[dict(p) for p in points],
        notes=notes,
    )
    return save_record(calibration, actor)


def science_calibration(calibration: RateCalibration) -> deposition.RateCalibration:
    return deposition.RateCalibration(
        model=calibration.model,
        rate_ml_per_min=calibration.rate_ml_per_min,
        uncertainty_ml_per_min=calibration.uncertainty_ml_per_min,
        n_points=len(calibration.points),
        residual_std=calibration.residual_std,
        reference_setting=calibration.reference_setting,
        parameters=tuple(calibration.parameters),
        covariance=tuple(tuple(row) for row in calibration.covariance),
    )


def _context(*, instrument_id: int | None, at: datetime | None) -> StepContext:
    def calibration_for(source_id: int):
        sources = DepositionSource.objects.filter(pk=source_id, retired_at__isnull=True)
        if instrument_id is not None:
            sources = sources.filter(instrument_id=instrument_id)
        source = sources.first()
        if source is None:
            raise StepErrors({"source": f"no deposition source {source_id} on this instrument"})
        calibrations = source.calibrations.filter(retired_at__isnull=True)
        if at is not None:
            # The calibration valid when the deposition happened, not a later one.
            calibrations = calibrations.filter(measured_at__lte=at)
        latest = calibrations.order_by("-measured_at").first()
        return None if latest is None else (science_calibration(latest), latest.pk)

    return StepContext(calibration_for=calibration_for)


# --- preparations -----------------------------------------------------------------------------


def steps_from_recipe(recipe: Recipe) -> list[dict[str, Any]]:
    return [dict(step) for step in recipe.steps]


@transaction.atomic
def record_preparation(
    *,
    sample: Sample,
    instrument,
    started_at: datetime,
    steps: Sequence[Mapping[str, Any]] | None = None,
    recipe: Recipe | None = None,
    ended_at: datetime | None = None,
    operator=None,
    notes: str = "",
    actor,
) -> Preparation:
    """Log a preparation with the values actually used; every derived dose is computed here,
    once, by the science library. All or nothing: a bad step saves no step."""
    require_member(actor)
    retired = {
        name: f"{record} is retired; it cannot take new preparations"
        for name, record in (("sample", sample), ("instrument", instrument), ("recipe", recipe))
        if record is not None and record.retired_at is not None
    }
    if retired:
        raise StepErrors(retired)
    if steps is None:
        if recipe is None:
            raise StepErrors({"steps": "give the steps, or a recipe to follow unchanged"})
        steps = steps_from_recipe(recipe)
    if ended_at is not None and ended_at < started_at:
        raise StepErrors({"ended_at": "ends before it starts"})
    def twin_error(twin: Preparation) -> StepErrors:
        # The same form sent twice (a double Enter, a retried request) must not log twice.
        return StepErrors(
            {"started_at": f"this sample already has a preparation at this time (#{twin.pk})"}
        )

    live_twins = Preparation.objects.filter(
        sample=sample, instrument=instrument, started_at=started_at, retired_at__isnull=True
    )
    twin = live_twins.first()
    if twin is not None:
        raise twin_error(twin)
    normalised = normalise_steps(list(steps), _context(instrument_id=instrument.pk, at=started_at))

    try:
        with transaction.atomic():
            # The twin was checked above, and the database enforces it (a request running at
            # the same time): no second check in the validation.
            preparation = save_record(
                Preparation(
                    sample=sample,
                    instrument=instrument,
                    operator=operator or actor,
                    started_at=started_at,
                    ended_at=ended_at,
                    recipe=recipe,
                    notes=notes,
                ),
                actor,
                validate_unique=False,
            )
    except IntegrityError:
        twin = live_twins.first()
        if twin is None:
            raise
        raise twin_error(twin) from None
    for position, step in enumerate(normalised):
        columns = {**step.values, **step.derived}
        columns["source_id"] = columns.pop("source", None)
        columns["calibration_id"] = columns.pop("calibration", None)
        unknown = set(columns) - _STEP_COLUMNS - {"source_id", "calibration_id"}
        if unknown:  # a step kind field without a column is a programming error, not input
            raise RuntimeError(f"step fields without a column: {sorted(unknown)}")
        record = PreparationStep(
            preparation=preparation,
            position=position,
            kind=step.kind,
            cleans=step.cleans,
            notes=step.notes,
            raw_input=_jsonable(step.raw),
            **{k: ("" if v is None and _is_text_column(k) else v) for k, v in columns.items()},
        )
        save_record(record, actor)
    return preparation


def _is_text_column(name: str) -> bool:
    field = PreparationStep._meta.get_field(name) if name in _STEP_COLUMNS else None
    return field is not None and field.get_internal_type() in ("CharField", "TextField")


def _jsonable(raw: Mapping[str, Any]) -> dict[str, Any]:
    return {
        k: (v if isinstance(v, str | int | float | bool) or v is None else str(v))
        for k, v in raw.items()
    }


@transaction.atomic
def retire(record, *, actor) -> None:
    """Retire a record (it stays and still resolves, but is no longer offered for new work)."""
    from django.utils import timezone

    require_member(actor)
    if record.retired_at is None:
        record.retired_at = timezone.now()
        save_record(record, actor)
