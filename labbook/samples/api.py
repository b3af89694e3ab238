"""The JSON API router of samples, recipes, deposition sources and preparations (DESIGN §4).

Thin edges: each write checks the caller's token (``require_write``), resolves the ids the
body refers to, calls one action of ``labbook.samples.actions`` and renders the record it
returns. Ids in the path that do not exist are 404; ids in the body that do not exist (or
are retired, so no longer offered for new work) are 422 naming the field.
"""

# No ``from __future__ import annotations`` here: ninja builds its query-parameter models
# from these signatures, and the Annotated time type must be a real object, not a string.
from typing import Any

from django.contrib.auth import get_user_model
from django.db.models import Model, Prefetch, Q, QuerySet
from django.utils import timezone
from ninja import Router, Status
from ninja.errors import HttpError
from ninja.errors import ValidationError as RequestInvalid
from ninja.pagination import LimitOffsetPagination, paginate

from labbook.accounts.permissions import is_lab_member
from labbook.instruments.models import Instrument
from labbook.samples import actions, queries
from labbook.samples.models import (
    DepositionSource,
    Preparation,
    PreparationStep,
    RateCalibration,
    Recipe,
    Sample,
)
from labbook.samples.schemas import (
    AwareTime,
    CalibrationIn,
    CalibrationOut,
    HistoryOut,
    PreparationIn,
    PreparationOut,
    RecipeIn,
    RecipeOut,
    RevisionIn,
    SampleIn,
    SampleOut,
    SourceIn,
    SourceOut,
    TransferIn,
    TransferOut,
)

router = Router(tags=["samples"])

#: The most preparations one page of ``GET /preparations`` carries, whatever ``limit`` asks.
PAGE_LIMIT = 500


# --- resolving ids --------------------------------------------------------------------------


def _one(records: QuerySet, pk: int, label: str) -> Any:
    """The record a path names, or 404."""
    record = records.filter(pk=pk).first()
    if record is None:
        raise HttpError(404, f"there is no {label} with id {pk}")
    return record


def _referenced(references: dict[str, tuple[type[Model], int | None, str]]) -> dict[str, Any]:
    """The records a body refers to by id, ``{field: record or None}``; a missing or retired
    one is a 422 naming its field (all of them at once)."""
    found: dict[str, Any] = {}
    errors = []
    for field, (model, pk, label) in references.items():
        if pk is None:
            found[field] = None
            continue
        record = model.objects.filter(pk=pk).first()
        if record is None:
            errors.append({"loc": ("body", field), "msg": f"there is no {label} with id {pk}"})
        elif getattr(record, "retired_at", None) is not None:
            errors.append({"loc": ("body", field), "msg": f"{label} {pk} ({record}) is retired"})
        elif model is get_user_model() and not is_lab_member(record):
            errors.append({"loc": ("body", field), "msg": f"user {pk} is not a member of the lab"})
        found[field] = record
    if errors:
        raise RequestInvalid(errors)
    return found


# --- samples --------------------------------------------------------------------------------


@router.get("/samples", response=list[SampleOut])
def list_samples(request, q: str = "", include_retired: bool = False) -> QuerySet[Sample]:
    """Samples by name; ``q`` matches a part of the name or the substrate."""
    found = Sample.objects.all() if include_retired else queries.samples()
    if q.strip():
        found = found.filter(Q(name__icontains=q.strip()) | Q(substrate__icontains=q.strip()))
    return found.order_by("name")


@router.post("/samples", response={201: SampleOut})
def create_sample(request, payload: SampleIn) -> Status:
    """A new sample; material, facet and monolayer density are read from the substrate
    where the tables know it (give ``monolayer_density_per_cm2`` to set it yourself)."""
    request.auth.require_write()
    sample = actions.create_sample(**payload.dict(), actor=request.auth.user)
    return Status(201, sample)


@router.get("/samples/{sample_id}", response=SampleOut)
def get_sample(request, sample_id: int) -> Sample:
    return _one(Sample.objects.all(), sample_id, "sample")


@router.get("/samples/{sample_id}/history", response=HistoryOut)
def sample_history(request, sample_id: int, at: AwareTime | None = None) -> dict[str, Any]:
    """Preparations (with every step) and transfers in time order, the surface right after
    each preparation, and the surface at ``at`` (now when not given)."""
    sample = _one(Sample.objects.all(), sample_id, "sample")
    history = queries.sample_history(sample)
    after = queries.surface_states_after(
        sample, [e.record for e in history if e.kind == "preparation"]
    )
    entries: list[dict[str, Any]] = []
    for entry in history:
        if entry.kind == "preparation":
            entries.append(
                {
                    "at": entry.at,
                    "kind": "preparation",
                    "preparation": entry.record,
                    "surface_state": after[entry.record.pk],
                }
            )
        else:
            entries.append({"at": entry.at, "kind": "transfer", "transfer": entry.record})
    return {
        "sample": sample,
        "entries": entries,
        "surface_state": queries.surface_state(sample, at or timezone.now()),
    }


@router.post("/samples/{sample_id}/transfers", response={201: TransferOut})
def transfer_sample(request, sample_id: int, payload: TransferIn) -> Status:
    """The sample moved to ``location`` at ``at``; an instrument-scoped token moves samples
    only with its own instrument."""
    request.auth.require_write(instrument_id=payload.instrument)
    sample = _one(Sample.objects.all(), sample_id, "sample")
    found = _referenced({"instrument": (Instrument, payload.instrument, "instrument")})
    transfer = actions.transfer_sample(
        sample,
        location=payload.location.value,
        at=payload.at,
        instrument=found["instrument"],
        notes=payload.notes,
        actor=request.auth.user,
    )
    return Status(201, transfer)


# --- recipes --------------------------------------------------------------------------------


def _recipes() -> QuerySet[Recipe]:
    # next_version tells whether a version is the newest without a query per recipe.
    return Recipe.objects.select_related("next_version")


@router.get("/recipes", response=list[RecipeOut])
def list_recipes(request, all_versions: bool = False) -> QuerySet[Recipe]:
    """The newest version of each recipe; ``all_versions=true`` lists every version."""
    if all_versions:
        return _recipes().filter(retired_at__isnull=True).order_by("name", "-version")
    return queries.current_recipes().select_related("next_version")


@router.get("/recipes/{recipe_id}", response=RecipeOut)
def get_recipe(request, recipe_id: int) -> Recipe:
    return _one(_recipes(), recipe_id, "recipe")


@router.post("/recipes", response={201: RecipeOut})
def create_recipe(request, payload: RecipeIn) -> Status:
    """Version 1 of a new recipe; its steps are checked as a preparation's would be."""
    request.auth.require_write()
    recipe = actions.create_recipe(**payload.dict(), actor=request.auth.user)
    return Status(201, recipe)


@router.post("/recipes/{recipe_id}/revisions", response={201: RecipeOut})
def revise_recipe(request, recipe_id: int, payload: RevisionIn) -> Status:
    """A new version of the recipe (only its newest version can be revised: 422 otherwise)."""
    request.auth.require_write()
    recipe = _one(Recipe.objects.all(), recipe_id, "recipe")
    revised = actions.revise_recipe(recipe, **payload.dict(), actor=request.auth.user)
    return Status(201, revised)


# --- deposition sources and their calibrations ---------------------------------------------------


def _sources() -> QuerySet[DepositionSource]:
    calibrations = RateCalibration.objects.filter(retired_at__isnull=True).order_by("-measured_at")
    return DepositionSource.objects.prefetch_related(
        Prefetch("calibrations", queryset=calibrations, to_attr="current_calibrations")
    )


@router.get("/deposition-sources", response=list[SourceOut])
def list_sources(request, instrument: int | None = None) -> QuerySet[DepositionSource]:
    sources = _sources().filter(retired_at__isnull=True)
    if instrument is not None:
        sources = sources.filter(instrument_id=instrument)
    return sources.order_by("instrument_id", "name")


@router.get("/deposition-sources/{source_id}", response=SourceOut)
def get_source(request, source_id: int) -> DepositionSource:
    return _one(_sources(), source_id, "deposition source")


@router.post("/deposition-sources", response={201: SourceOut})
def create_source(request, payload: SourceIn) -> Status:
    """A source on an instrument (managers; a scoped token only on its own instrument)."""
    request.auth.require_write(instrument_id=payload.instrument)
    found = _referenced({"instrument": (Instrument, payload.instrument, "instrument")})
    source = actions.add_deposition_source(
        found["instrument"],
        name=payload.name,
        material=payload.material,
        kind=payload.kind.value,
        notes=payload.notes,
        actor=request.auth.user,
    )
    return Status(201, source)


@router.post("/deposition-sources/{source_id}/calibrations", response={201: CalibrationOut})
def calibrate_source(request, source_id: int, payload: CalibrationIn) -> Status:
    """Fit the source's rate from measured coverages; deposits logged after ``measured_at``
    take their rate (and its uncertainty) from it."""
    source = _one(DepositionSource.objects.all(), source_id, "deposition source")
    request.auth.require_write(instrument_id=source.instrument_id)
    calibration = actions.record_calibration(
        source,
        points=payload.points_in_units(),
        measured_at=payload.measured_at,
        model=payload.model,
        method=payload.method.value,
        coverage_definition=payload.coverage_definition,
        notes=payload.notes,
        actor=request.auth.user,
    )
    return Status(201, calibration)


# --- preparations -------------------------------------------------------------------------------


def _preparations() -> QuerySet[Preparation]:
    return Preparation.objects.prefetch_related(
        Prefetch("steps", queryset=PreparationStep.objects.order_by("position"))
    )


@router.post("/preparations", response={201: PreparationOut})
def log_preparation(request, payload: PreparationIn) -> Status:
    """Log a preparation with the values actually used; the answer carries every step's
    derived quantities. Leave ``steps`` out to follow ``recipe`` unchanged."""
    request.auth.require_write(instrument_id=payload.instrument)
    found = _referenced(
        {
            "sample": (Sample, payload.sample, "sample"),
            "instrument": (Instrument, payload.instrument, "instrument"),
            "recipe": (Recipe, payload.recipe, "recipe"),
            "operator": (get_user_model(), payload.operator, "user"),
        }
    )
    preparation = actions.record_preparation(
        **found,
        started_at=payload.started_at,
        ended_at=payload.ended_at,
        steps=payload.steps,
        notes=payload.notes,
        actor=request.auth.user,
    )
    return Status(201, _preparations().get(pk=preparation.pk))


@router.get("/preparations", response=list[PreparationOut])
@paginate(LimitOffsetPagination, max_limit=PAGE_LIMIT)
def list_preparations(
    request,
    sample: int | None = None,
    instrument: int | None = None,
    since: AwareTime | None = None,
    until: AwareTime | None = None,
) -> QuerySet[Preparation]:
    """Newest first; ``since`` ≤ started_at < ``until``. Pages of ``limit`` (at most 500)
    from ``offset``: ``{items, count}``."""
    found = _preparations().filter(retired_at__isnull=True)
    if sample is not None:
        found = found.filter(sample_id=sample)
    if instrument is not None:
        found = found.filter(instrument_id=instrument)
    if since is not None:
        found = found.filter(started_at__gte=since)
    if until is not None:
        found = found.filter(started_at__lt=until)
    # The id breaks ties so that pages never repeat or skip a preparation.
    return found.order_by("-started_at", "-pk")


@router.get("/preparations/{preparation_id}", response=PreparationOut)
def get_preparation(request, preparation_id: int) -> Preparation:
    return _one(_preparations(), preparation_id, "preparation")
