"""Lineage of an acquired file: what was in the microscope when it was taken.

Resolved once, when the file is processed (and again after a correction), from the other
apps' queries, and stored on the file: the instrument, the operator, the sample on the stage
and its surface state (last preparation, coverage per adsorbate), the tip and its state, and
the instrument's state snapshot. A search never recomputes it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from django.contrib.auth import get_user_model

from labbook.instruments import queries as instrument_queries
from labbook.instruments.models import Instrument
from labbook.logbook import queries as logbook_queries
from labbook.samples import queries as sample_queries
from labbook.samples.models import Preparation, Sample
from labbook.tips import queries as tip_queries
from labbook.tips.models import Tip


@dataclass
class Lineage:
    instrument: Instrument | None = None
    operator: Any = None
    sample: Sample | None = None
    preparation: Preparation | None = None
    tip: Tip | None = None
    coverages: list[dict[str, Any]] = field(default_factory=list)
    snapshot: dict[str, Any] = field(default_factory=dict)

    @property
    def coverage_ml(self) -> float | None:
        if self.sample is None:
            return None
        return sum(c["coverage_ml"] for c in self.coverages)


def _lookup(model, value, *, by: str = "name"):
    """A record by id (an int or a digit string) or by its natural name; None if not found."""
    if value in (None, ""):
        return None
    if isinstance(value, model):
        return value
    if isinstance(value, int) or (isinstance(value, str) and value.isdigit()):
        return model.objects.filter(pk=int(value)).first()
    return model.objects.filter(**{by: str(value)}).first()


def _iso(value: datetime | None) -> str | None:
    return None if value is None else value.isoformat()


def resolve(
    *,
    acquired_at: datetime | None,
    metadata: dict[str, Any],
    instrument: Instrument | None = None,
    uploaded_by=None,
) -> Lineage:
    """What was in the microscope at ``acquired_at``. Explicit metadata (``instrument``,
    ``sample``, ``tip``, ``operator`` as ids or names) wins over what the records imply."""
    User = get_user_model()  # noqa: N806
    found = Lineage()
    found.instrument = _lookup(Instrument, metadata.get("instrument")) or instrument
    found.sample = _lookup(Sample, metadata.get("sample"))
    found.tip = _lookup(Tip, metadata.get("tip"))
    found.operator = _lookup(User, metadata.get("operator"), by="username")
    snapshot: dict[str, Any] = {"acquired_at": _iso(acquired_at)}

    if found.instrument is not None and acquired_at is not None:
        if found.sample is None:
            found.sample = sample_queries.sample_on_stage(found.instrument, acquired_at)
        if found.tip is None:
            mount = tip_queries.tip_mounted(found.instrument, acquired_at)
            found.tip = None if mount is None else mount.tip
        if found.operator is None:
            session = logbook_queries.session_at(found.instrument, acquired_at)
            if session is not None:
                found.operator = session.operator
                snapshot["session"] = session.pk
        state = instrument_queries.state_at(found.instrument, acquired_at)
        snapshot["instrument_state"] = {
            "flags": list(state.flags),
            "channels": [
                {
                    "channel": c.channel.pk,
                    "name": c.channel.name,
                    "quantity": c.channel.quantity,
                    "unit": c.channel.unit,
                    "t": _iso(c.t),
                    "value": c.value,
                    "age_s": None if c.age is None else c.age.total_seconds(),
                    "flags": list(c.flags),
                    "vacuum_range": None if c.vacuum_range is None else c.vacuum_range.name,
                }
                for c in state.channels
            ],
            "events": [
                {
                    "id": e.pk,
                    "kind": e.kind,
                    "start": _iso(e.start),
                    "end": _iso(e.end),
                    "summary": e.summary,
                }
                for e in state.events
            ],
        }
    if found.operator is None:
        found.operator = uploaded_by if getattr(uploaded_by, "is_authenticated", False) else None

    if found.sample is not None and acquired_at is not None:
        surface = sample_queries.surface_state(found.sample, acquired_at)
        found.preparation = sample_queries.last_preparation_before(found.sample, acquired_at)
        found.coverages = [
            {
                "material": c.material,
                "coverage_ml": c.coverage_ml,
                "uncertainty_ml": c.uncertainty_ml,
                "definition": c.definition,
            }
            for c in surface.coverages
        ]
        snapshot["surface_state"] = {
            "cleaned_at": _iso(surface.cleaned_at),
            "coverages": found.coverages,
            "exposures_langmuir": surface.exposures_langmuir,
            "anneal_time_s": surface.anneal_time_s,
            "preparations": [p.pk for p in surface.preparations],
            "steps_since_cleaning": len(surface.steps),
        }
    if found.tip is not None and acquired_at is not None:
        state = tip_queries.tip_state(found.tip, acquired_at)
        snapshot["tip_state"] = {
            "tip": found.tip.pk,
            "mount": None if state.mount is None else state.mount.pk,
            "mounted_at": None if state.mount is None else _iso(state.mount.start),
            "events": [
                {
                    "id": e.pk,
                    "kind": e.kind,
                    "at": _iso(e.at),
                    "params": e.params,
                    "outcome": e.outcome,
                }
                for e in state.events
            ],
            "apex_species": state.apex_species,
        }
    found.snapshot = snapshot
    return found
