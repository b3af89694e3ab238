"""Read-side queries of provenance: everything a dataset depends on, in one place, read in a
fixed number of queries whatever the length of the sample's, the tip's or the instrument's
history; other apps (the dataset page, the exports) read provenance through these.

What is stored with the file when it was resolved (the instrument's state snapshot, the
coverage rows, the links) is read as stored; the preparations since the last cleaning and the
tip's conditioning since mounting are read from their own tables, so a step logged late or a
correction shows here at once. Where the two disagree, ``Provenance.stale`` says so.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from django.db.models import Prefetch, Q, QuerySet

import labbook
from labbook.datafiles.models import AcquiredFile
from labbook.logbook import queries as logbook_queries
from labbook.logbook.models import Session
from labbook.samples import queries as sample_queries
from labbook.samples.models import Preparation, PreparationStep, Sample
from labbook.samples.queries import SurfaceState
from labbook.tips import queries as tip_queries
from labbook.tips.models import Conditioning, Tip
from labbook.tips.queries import TipState

# Row times nobody reads here: not loading them saves converting thousands of datetimes.
_BOOKKEEPING = ("created_at", "updated_at")
#: How many datasets each neighbour list shows (the count says how many there are in all).
NEIGHBOURS = 12
#: A sample never cleaned has its whole history as its surface: the newest this many
#: preparations are shown, and ``preparations_truncated`` says so.
MAX_PREPARATIONS = 200

# Step columns worth showing: the values as logged and the doses derived from them. The
# bookkeeping columns (ids, history, raw input) are left out.
_STEP_SKIP = frozenset(
    {
        "id",
        "preparation",
        "position",
        "kind",
        "cleans",
        "notes",
        "description",
        "raw_input",
        "source",
        "calibration",
        "created_at",
        "updated_at",
        "retired_at",
        "retired_reason",
    }
)


@dataclass(frozen=True)
class Neighbours:
    """Other datasets that share one condition with this one: the first ``NEIGHBOURS`` of them
    (newest first) and how many there are in all."""

    label: str
    files: list[AcquiredFile]
    count: int
    basis: str  # what was shared, in words


@dataclass
class Provenance:
    file: AcquiredFile
    acquired_at: datetime | None
    sample: Sample | None
    preparation: Preparation | None
    # Oldest first: the preparation holding the last cleaning step (if any), then every later
    # one up to the acquisition, each with its steps prefetched.
    preparations: list[Preparation]
    preparations_truncated: bool
    cleaning_step: PreparationStep | None
    surface: SurfaceState | None
    tip: Tip | None
    tip_state: TipState | None
    tip_state_until: datetime | None  # the next conditioning or unmounting after acquisition
    instrument_state: dict[str, Any]
    session: Session | None
    operator: Any
    processing: dict[str, Any]
    checksums: dict[str, str]
    neighbours: dict[str, Neighbours] = field(default_factory=dict)
    stale: list[str] = field(default_factory=list)

    @property
    def coverages(self) -> list[sample_queries.Coverage]:
        return [] if self.surface is None else self.surface.coverages


def _file(file_or_id: AcquiredFile | int) -> AcquiredFile:
    """The dataset with everything its provenance names, in one query (plus one for coverage
    rows)."""
    pk = file_or_id.pk if isinstance(file_or_id, AcquiredFile) else int(file_or_id)
    return (
        AcquiredFile.objects.select_related(
            "instrument",
            "operator",
            "uploaded_by",
            "sample",
            "preparation",
            "preparation__recipe",
            "preparation__operator",
            "tip",
        )
        .prefetch_related("coverages")
        .get(pk=pk)
    )


def _steps() -> QuerySet[PreparationStep]:
    # Retired steps count as samples.queries.surface_state counts them (only a retired
    # preparation drops out), so the fold here and the stored lineage agree.
    return (
        PreparationStep.objects.select_related("source", "calibration")
        .defer(*_BOOKKEEPING)
        .order_by("position")
    )


def _preparations_since_cleaning(
    sample: Sample, at: datetime
) -> tuple[list[Preparation], PreparationStep | None, bool]:
    """The preparations from the one holding the last cleaning step up to ``at``: three
    queries (the cleaning step, the preparations, their steps)."""
    steps_until = PreparationStep.objects.filter(
        preparation__sample=sample,
        preparation__started_at__lte=at,
        preparation__retired_at__isnull=True,
        cleans=True,
    )
    cleaning = (
        steps_until.select_related("preparation")
        .order_by("-preparation__started_at", "-preparation_id", "-position")
        .first()
    )
    found = sample.preparations.filter(retired_at__isnull=True, started_at__lte=at)
    if cleaning is not None:
        started = cleaning.preparation.started_at
        found = found.filter(
            Q(started_at__gt=started) | Q(started_at=started, pk__gte=cleaning.preparation_id)
        )
    newest = list(
        found.select_related("recipe", "operator", "instrument")
        .defer(*_BOOKKEEPING)
        .prefetch_related(Prefetch("steps", queryset=_steps()))
        .order_by("-started_at", "-pk")[: MAX_PREPARATIONS + 1]
    )
    truncated = len(newest) > MAX_PREPARATIONS
    return list(reversed(newest[:MAX_PREPARATIONS])), cleaning, truncated


def _surface_at(
    sample: Sample, at: datetime, cleaning: PreparationStep | None, preparations: list[Preparation]
) -> SurfaceState:
    """The surface at ``at`` by the samples app's own rule, folded once over the steps already
    loaded. (``surface_states_after`` would fold once per preparation: 15 ms for 100 of them,
    bench "provenance".)"""
    since: list[PreparationStep] = []
    for preparation in preparations:
        for step in preparation.steps.all():
            step.preparation = preparation  # already loaded: the fold reads it without a query
            if step.cleans:
                since = []
            else:
                since.append(step)
    if cleaning is not None and preparations and preparations[0].pk == cleaning.preparation_id:
        cleaning.preparation = preparations[0]
    return sample_queries.fold_steps(sample, at, cleaning, since)


def _tip_state(tip: Tip, at: datetime) -> TipState:
    """``tips.queries.tip_state`` built from the same public parts (the mount at ``at``, the
    conditioning since it, the apex rule), with who conditioned the tip in one query and
    without the columns nobody reads here (500 events: about a third less time)."""
    mount = tip_queries.mount_of(tip, at)
    if mount is None:
        return TipState(tip=tip, at=at, mount=None)
    events = list(
        tip_queries.conditioning_of(tip, since=mount.start, until=at)
        .defer("params_raw", *_BOOKKEEPING)
        .prefetch_related("performed_by")
    )
    return TipState(
        tip=tip, at=at, mount=mount, events=events, apex_species=tip_queries.apex_species(events)
    )


def step_values(step: PreparationStep) -> dict[str, Any]:
    """The non-empty values of a step, as logged and as derived, by column name (units in the
    names)."""
    values: dict[str, Any] = {}
    for column in PreparationStep._meta.concrete_fields:
        name = column.name
        if name in _STEP_SKIP:
            continue
        value = getattr(step, column.attname)
        if value in (None, ""):
            continue
        values[name] = value
    if step.source_id is not None:
        values["source"] = str(step.source)
    if step.calibration_id is not None:
        values["calibration"] = str(step.calibration)
    return values


def _with_total(files: QuerySet[AcquiredFile]) -> tuple[list[AcquiredFile], int]:
    """A page of neighbours and their total. Two queries, not one with a window count: the
    window makes the database build every matching row before the LIMIT (4 ms for 3,000
    datasets on SQLite, bench "provenance"), where a COUNT walks an index."""
    return list(files[:NEIGHBOURS]), files.order_by().count()


def _neighbour_files(record: AcquiredFile) -> QuerySet[AcquiredFile]:
    return (
        AcquiredFile.objects.filter(retired_at__isnull=True)
        .exclude(pk=record.pk)
        .only("id", "original_name", "kind", "acquired_at", "bias_v", "setpoint_a", "sha256")
        .order_by("-acquired_at", "-id")
    )


def _neighbours(
    record: AcquiredFile,
    tip_state: TipState | None,
    tip_state_until: datetime | None,
    session: Session | None,
) -> dict[str, Neighbours]:
    found: dict[str, Neighbours] = {}
    base = _neighbour_files(record)
    at = record.acquired_at
    if tip_state is not None and tip_state.mount is not None and at is not None:
        # The same tip state: the same tip, mounted the same time, with no conditioning
        # between the two acquisitions.
        since = tip_state.events[-1].at if tip_state.events else tip_state.mount.start
        files = base.filter(tip_id=record.tip_id, acquired_at__gte=since)
        if tip_state_until is not None:
            files = files.filter(acquired_at__lt=tip_state_until)
        rows, count = _with_total(files)
        found["tip_state"] = Neighbours(
            "Taken with the same tip state", rows, count, "same tip, no conditioning between"
        )
    if record.sample_id is not None and at is not None:
        # The same surface state: the same sample after the same last preparation.
        files = base.filter(sample_id=record.sample_id, preparation_id=record.preparation_id)
        rows, count = _with_total(files)
        found["surface_state"] = Neighbours(
            "Same surface state", rows, count, "same sample, same last preparation"
        )
    if session is not None:
        files = base.filter(instrument_id=session.instrument_id, acquired_at__gte=session.start)
        if session.end is not None:
            files = files.filter(acquired_at__lt=session.end)
        rows, count = _with_total(files)
        found["session"] = Neighbours(
            "Same session", rows, count, f"on {session.instrument} during the session"
        )
    return found


def _processing(record: AcquiredFile) -> dict[str, Any]:
    """What labbook computed from the bytes, as stored: the reader (name/version), when, the
    statistics' inputs and whether a preview was made."""
    detail = record.stats.get("detail") if isinstance(record.stats, dict) else None
    return {
        "status": record.status,
        "reader": record.reader,
        "software": f"labbook {labbook.__version__}",
        "processed_at": record.processed_at,
        "attempts": record.attempts,
        "statistics": sorted(k for k in (record.stats or {}) if k != "detail"),
        "statistics_channel": (record.stats or {}).get("channel"),
        "parameters": {
            key: record.metadata.get(key)
            for key in ("coverage_threshold_m", "scan_size_m", "pixels", "channel_name")
            if record.metadata.get(key) is not None
        },
        "levelling": "plane" if detail is not None else None,
        "thumbnail": bool(record.thumbnail_name),
        "warnings": record.error if record.status == AcquiredFile.Status.READY else "",
        "lineage_resolved_at": record.lineage_resolved_at,
    }


def provenance_of(file: AcquiredFile | int, *, neighbours: bool = True) -> Provenance:
    """Everything ``file`` depends on. At most 16 queries, whatever the history's length:
    the file (2), the preparations since the last cleaning (3), the tip's mount and its
    conditioning with who did it (4), the session (1), and two per neighbour list (6)."""
    record = _file(file)
    at = record.acquired_at
    snapshot = record.lineage if isinstance(record.lineage, dict) else {}
    stale: list[str] = []

    preparations: list[Preparation] = []
    cleaning = None
    truncated = False
    surface = None
    if record.sample is not None and at is not None:
        preparations, cleaning, truncated = _preparations_since_cleaning(record.sample, at)
        surface = _surface_at(record.sample, at, cleaning, preparations)
        last = preparations[-1].pk if preparations else None
        if last != record.preparation_id:
            stale.append("preparation")

    tip_state = None
    until = None
    if record.tip is not None and at is not None:
        tip_state = _tip_state(record.tip, at)
        if tip_state is not None and tip_state.mount is not None:
            following = (
                Conditioning.objects.filter(tip=record.tip, retired_at__isnull=True, at__gt=at)
                .order_by("at", "pk")
                .values_list("at", flat=True)
                .first()
            )
            ends = [t for t in (following, tip_state.mount.end) if t is not None]
            until = min(ends) if ends else None

    session = None
    if record.instrument is not None and at is not None:
        session = logbook_queries.session_at(record.instrument, at)

    found = Provenance(
        file=record,
        acquired_at=at,
        sample=record.sample,
        preparation=record.preparation,
        preparations=preparations,
        preparations_truncated=truncated,
        cleaning_step=cleaning,
        surface=surface,
        tip=record.tip,
        tip_state=tip_state,
        tip_state_until=until,
        instrument_state=snapshot.get("instrument_state") or {},
        session=session,
        operator=record.operator,
        processing=_processing(record),
        checksums={"sha256": record.sha256},
        stale=stale,
    )
    stored = {c.material: c.coverage_ml for c in record.coverages.all()}
    live = {c.material: c.coverage_ml for c in found.coverages}
    differs = stored.keys() != live.keys() or any(
        abs(stored[m] - live[m]) > 1e-9 * max(1.0, abs(live[m])) for m in stored
    )
    if record.sample is not None and at is not None and differs:
        stale.append("coverage")
    if neighbours:
        found.neighbours = _neighbours(record, tip_state, until, session)
    return found


# --- the JSON form (the API's answer, and a file in every crate) ------------------------------


def _iso(value: datetime | None) -> str | None:
    return None if value is None else value.isoformat()


def _person(user) -> dict[str, Any] | None:
    if user is None:
        return None
    return {"id": user.pk, "username": user.get_username(), "name": user.get_full_name()}


def _coverage(c: sample_queries.Coverage) -> dict[str, Any]:
    return {
        "material": c.material,
        "coverage_ml": c.coverage_ml,
        "uncertainty_ml": c.uncertainty_ml,
        "definition": c.definition,
    }


def _surface(state: SurfaceState) -> dict[str, Any]:
    return {
        "cleaned_at": _iso(state.cleaned_at),
        "coverages": [_coverage(c) for c in state.coverages],
        "exposures_langmuir": state.exposures_langmuir,
        "anneal_time_s": state.anneal_time_s,
        "steps_since_cleaning": len(state.steps),
    }


def as_json(found: Provenance) -> dict[str, Any]:
    """The provenance as plain JSON values (times ISO 8601 with their offset, SI units named
    in the keys), as ``GET /files/{id}/provenance`` answers it."""
    record = found.file
    tip_state = found.tip_state
    return {
        "file": {
            "id": record.pk,
            "original_name": record.original_name,
            "kind": record.kind,
            "status": record.status,
            "acquired_at": _iso(record.acquired_at),
            "size_bytes": record.size_bytes,
            "bias_v": record.bias_v,
            "setpoint_a": record.setpoint_a,
            "temperature_k": record.temperature_k,
        },
        "checksums": found.checksums,
        "instrument": None
        if record.instrument is None
        else {"id": record.instrument.pk, "name": record.instrument.name},
        "operator": _person(found.operator),
        "uploaded_by": _person(record.uploaded_by),
        "session": None
        if found.session is None
        else {
            "id": found.session.pk,
            "start": _iso(found.session.start),
            "end": _iso(found.session.end),
            "goal": found.session.goal,
            "operator": _person(found.session.operator),
        },
        "sample": None
        if found.sample is None
        else {
            "id": found.sample.pk,
            "name": found.sample.name,
            "substrate": found.sample.substrate,
            "identifier": found.sample.identifier,
        },
        "preparation": record.preparation_id,
        "cleaning_step": None if found.cleaning_step is None else found.cleaning_step.pk,
        "preparations": [
            {
                "id": p.pk,
                "started_at": _iso(p.started_at),
                "ended_at": _iso(p.ended_at),
                "recipe": None if p.recipe is None else str(p.recipe),
                "instrument": p.instrument_id,
                "operator": _person(p.operator),
                "notes": p.notes,
                "steps": [
                    {
                        "id": s.pk,
                        "position": s.position,
                        "kind": s.kind,
                        "cleans": s.cleans,
                        "notes": s.notes,
                        "values": step_values(s),
                    }
                    for s in p.steps.all()
                ],
            }
            for p in found.preparations
        ],
        "preparations_truncated": found.preparations_truncated,
        "surface_state": None if found.surface is None else _surface(found.surface),
        "tip": None
        if found.tip is None
        else {
            "id": found.tip.pk,
            "name": found.tip.name,
            "material": found.tip.material,
            "origin": found.tip.origin,
        },
        "tip_state": None
        if tip_state is None
        else {
            "mount": None
            if tip_state.mount is None
            else {
                "id": tip_state.mount.pk,
                "instrument": tip_state.mount.instrument_id,
                "start": _iso(tip_state.mount.start),
                "end": _iso(tip_state.mount.end),
            },
            "apex_species": tip_state.apex_species,
            "conditioning": [
                {
                    "id": e.pk,
                    "kind": e.kind,
                    "at": _iso(e.at),
                    "params": e.params,
                    "outcome": e.outcome,
                    "performed_by": _person(e.performed_by),
                }
                for e in tip_state.events
            ],
            "until": _iso(found.tip_state_until),
        },
        "instrument_state": found.instrument_state,
        "processing": {
            **found.processing,
            "processed_at": _iso(found.processing["processed_at"]),
            "lineage_resolved_at": _iso(found.processing["lineage_resolved_at"]),
        },
        "neighbours": {
            key: {
                "label": n.label,
                "basis": n.basis,
                "count": n.count,
                "files": [
                    {
                        "id": f.pk,
                        "original_name": f.original_name,
                        "kind": f.kind,
                        "acquired_at": _iso(f.acquired_at),
                    }
                    for f in n.files
                ],
            }
            for key, n in found.neighbours.items()
        },
        "stale": found.stale,
    }
