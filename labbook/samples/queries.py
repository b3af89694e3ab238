"""Read-side queries of samples: where a sample is, what its surface is at an instant, and its
history. Other apps (datasets, provenance) read samples through these."""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field
from datetime import datetime

from django.db.models import Prefetch, Q, QuerySet

from labbook.samples.models import Preparation, PreparationStep, Recipe, Sample, Transfer


@dataclass(frozen=True)
class Coverage:
    material: str
    coverage_ml: float
    # Root-sum-square of the steps' standard uncertainties; None when any step had no
    # uncertainty (a rate typed by hand), since an unknown part cannot be added.
    uncertainty_ml: float | None
    definition: str


@dataclass
class SurfaceState:
    """A sample's surface at an instant: what has been done to it since it was last clean."""

    sample: Sample
    at: datetime
    cleaned_at: datetime | None
    cleaning_step: PreparationStep | None
    steps: list[PreparationStep] = field(default_factory=list)
    coverages: list[Coverage] = field(default_factory=list)
    exposures_langmuir: dict[str, float] = field(default_factory=dict)
    anneal_time_s: float = 0.0
    preparations: list[Preparation] = field(default_factory=list)

    @property
    def is_clean(self) -> bool:
        return self.cleaned_at is not None and not self.coverages and not self.exposures_langmuir

    def coverage_of(self, material: str) -> float:
        return next((c.coverage_ml for c in self.coverages if c.material == material), 0.0)


def samples() -> QuerySet[Sample]:
    return Sample.objects.filter(retired_at__isnull=True)


def current_recipes() -> QuerySet[Recipe]:
    """The newest version of each recipe that is not retired."""
    return Recipe.objects.filter(retired_at__isnull=True, next_version__isnull=True).order_by(
        "name"
    )


def _steps_until(sample: Sample, at: datetime) -> QuerySet[PreparationStep]:
    return (
        PreparationStep.objects.filter(
            preparation__sample=sample,
            preparation__started_at__lte=at,
            preparation__retired_at__isnull=True,
        )
        .select_related("preparation", "preparation__recipe", "preparation__operator")
        .order_by("preparation__started_at", "preparation_id", "position")
    )


def surface_state(sample: Sample, at: datetime) -> SurfaceState:
    """The steps since the last cleaning step at or before ``at``, with the cumulative
    coverage per adsorbate, the gas exposures (corrected for the gauge) and the anneal time.

    Two queries whatever the length of the sample's history: the last cleaning step, then
    only the steps after it (a year of preparations is not read to find one morning's).
    """
    steps = _steps_until(sample, at)
    cleaning_step = (
        steps.filter(cleans=True)
        .order_by("-preparation__started_at", "-preparation_id", "-position")
        .first()
    )
    if cleaning_step is not None:
        started = cleaning_step.preparation.started_at
        steps = steps.filter(
            Q(preparation__started_at__gt=started)
            | Q(preparation__started_at=started, preparation_id__gt=cleaning_step.preparation_id)
            | Q(preparation_id=cleaning_step.preparation_id, position__gt=cleaning_step.position)
        )
    return fold_steps(sample, at, cleaning_step, list(steps))


def surface_states_after(
    sample: Sample, preparations: list[Preparation]
) -> dict[int, SurfaceState]:
    """{preparation id: the surface right after it}, folded over steps already loaded (the
    preparations with their steps prefetched): no query per preparation."""
    states: dict[int, SurfaceState] = {}
    since: list[PreparationStep] = []
    cleaning: PreparationStep | None = None
    for preparation in sorted(preparations, key=lambda p: (p.started_at, p.pk)):
        for step in preparation.steps.all():
            step.preparation = preparation  # already loaded: no query when the fold reads it
            if step.cleans:
                cleaning, since = step, []
            else:
                since.append(step)
        states[preparation.pk] = fold_steps(sample, preparation.started_at, cleaning, list(since))
    return states


def fold_steps(
    sample: Sample,
    at: datetime,
    cleaning_step: PreparationStep | None,
    since: list[PreparationStep],
) -> SurfaceState:
    """The surface-state rule, in one place: what the steps since the cleaning add up to."""
    state = SurfaceState(
        sample=sample,
        at=at,
        cleaned_at=None if cleaning_step is None else cleaning_step.preparation.started_at,
        cleaning_step=cleaning_step,
        steps=since,
    )
    totals: dict[str, float] = defaultdict(float)
    variances: dict[str, float | None] = {}
    definitions: dict[str, str] = {}
    preparations: dict[int, Preparation] = {}
    for step in since:
        preparations.setdefault(step.preparation_id, step.preparation)
        if step.kind == PreparationStep.Kind.DEPOSIT and step.coverage_ml is not None:
            totals[step.material] += step.coverage_ml
            definitions.setdefault(step.material, step.coverage_definition)
            previous = variances.get(step.material, 0.0)
            if previous is None or step.coverage_uncertainty_ml is None:
                variances[step.material] = None
            else:
                variances[step.material] = previous + step.coverage_uncertainty_ml**2
        elif (
            step.kind == PreparationStep.Kind.DOSE and step.exposure_langmuir_corrected is not None
        ):
            state.exposures_langmuir[step.gas] = (
                state.exposures_langmuir.get(step.gas, 0.0) + step.exposure_langmuir_corrected
            )
        elif step.kind == PreparationStep.Kind.ANNEAL and step.duration_s:
            state.anneal_time_s += step.duration_s
    state.coverages = [
        Coverage(
            material=material,
            coverage_ml=total,
            uncertainty_ml=None if variances[material] is None else variances[material] ** 0.5,
            definition=definitions[material],
        )
        for material, total in sorted(totals.items())
    ]
    state.preparations = list(preparations.values())
    return state


def location_at(sample: Sample, at: datetime) -> Transfer | None:
    return sample.transfers.filter(at__lte=at, retired_at__isnull=True).order_by("-at").first()


def last_preparation(sample: Sample, *, instrument=None) -> Preparation | None:
    preparations = sample.preparations.filter(retired_at__isnull=True)
    if instrument is not None:
        preparations = preparations.filter(instrument=instrument)
    return preparations.order_by("-started_at").prefetch_related("steps").first()


def preparations_of(sample: Sample) -> QuerySet[Preparation]:
    return (
        sample.preparations.filter(retired_at__isnull=True)
        .select_related("instrument", "operator", "recipe")
        .prefetch_related(Prefetch("steps", queryset=PreparationStep.objects.order_by("position")))
        .order_by("started_at")
    )


@dataclass(frozen=True)
class HistoryEntry:
    at: datetime
    kind: str  # "preparation" | "transfer"
    record: Preparation | Transfer


def sample_history(sample: Sample) -> list[HistoryEntry]:
    """The sample's preparations and transfers in time order (datasets join later)."""
    entries = [HistoryEntry(p.started_at, "preparation", p) for p in preparations_of(sample)]
    transfers = sample.transfers.filter(retired_at__isnull=True).select_related("instrument")
    entries += [HistoryEntry(t.at, "transfer", t) for t in transfers]
    return sorted(entries, key=lambda entry: entry.at)


def step_as_template(step: PreparationStep) -> dict:
    """A logged step as the input that would log it again ("repeat the last preparation"):
    the raw values as typed where they were typed, the stored values otherwise."""
    from labbook.samples.steps import STEP_KINDS

    kind = STEP_KINDS[step.kind]
    template: dict = {"kind": step.kind, "cleans": step.cleans}
    if step.notes:
        template["notes"] = step.notes
    for name in kind.fields:
        if name in step.raw_input:
            template[name] = step.raw_input[name]
            continue
        if name in kind.derived_fields:  # computed from other fields, not typed
            continue
        value = getattr(step, "source_id" if name == "source" else name, None)
        if value not in (None, ""):
            template[name] = value
    return template


def sample_on_stage(instrument, at: datetime) -> Sample | None:
    """The sample on the instrument's microscope stage at ``at``: the latest move onto that
    stage, provided the sample has not been moved anywhere since."""
    from labbook.samples.models import Location

    arrival = (
        Transfer.objects.filter(
            instrument=instrument,
            location=Location.MICROSCOPE_STAGE,
            at__lte=at,
            retired_at__isnull=True,
        )
        .select_related("sample")
        .order_by("-at")
        .first()
    )
    if arrival is None:
        return None
    latest = location_at(arrival.sample, at)
    if latest is None or latest.pk != arrival.pk:
        return None
    return arrival.sample


def last_preparation_before(sample: Sample, at: datetime) -> Preparation | None:
    return (
        sample.preparations.filter(retired_at__isnull=True, started_at__lte=at)
        .order_by("-started_at")
        .first()
    )
