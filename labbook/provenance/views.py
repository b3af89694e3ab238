"""The pages of provenance: the provenance panel of the dataset page (included from
datafiles/dataset.html with the context ``panel_context`` builds).

Presenters only: the numbers and links come from ``queries.provenance_of``; nothing here
recomputes a surface state, a tip state or a dose.
"""

from __future__ import annotations

import importlib.util
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from labbook.datafiles.models import AcquiredFile
from labbook.provenance import queries
from labbook.samples.views import step_view
from labbook.web.templatetags.labbook_format import format_quantity, formula

_STALE = {
    "preparation": "a preparation was logged or retired after this dataset's lineage was stored:"
    " the last preparation stored with it is not the last one logged before it",
    "coverage": "the coverage stored with the dataset differs from what the preparations"
    " logged now add up to",
}


@dataclass
class PreparationView:
    preparation: Any
    steps: list
    holds_cleaning: bool


@dataclass
class NeighbourView:
    key: str
    label: str
    basis: str
    count: int
    files: list[AcquiredFile]

    @property
    def more(self) -> int:
        return max(0, self.count - len(self.files))


@dataclass
class Panel:
    found: queries.Provenance
    surface: list[str]
    preparations: list[PreparationView]
    neighbours: list[NeighbourView]
    processing: list[tuple[str, str]]
    stale: list[str] = field(default_factory=list)
    history_tag: bool = False
    processed_at: datetime | None = None


def _coverage_text(c) -> str:
    text = f"{formula(c.material)} {format_quantity(c.coverage_ml, 'ML')}"
    if c.uncertainty_ml is not None:
        text += f" ± {format_quantity(c.uncertainty_ml, 'ML')}"
    return text


def _lengths(value: Any) -> str:
    values = value if isinstance(value, list | tuple) else [value]
    return " × ".join(format_quantity(v, "m") for v in values)


def _parameter_lines(parameters: dict[str, Any]) -> list[tuple[str, str]]:
    """The inputs the statistics were computed with, in the units a lab reads them in."""
    lines = []
    if "scan_size_m" in parameters:
        lines.append(("Scan size", _lengths(parameters["scan_size_m"])))
    if "pixels" in parameters:
        pixels = parameters["pixels"]
        shown = pixels if not isinstance(pixels, list | tuple) else " × ".join(map(str, pixels))
        lines.append(("Pixels", str(shown)))
    if "coverage_threshold_m" in parameters:
        lines.append(("Coverage threshold", _lengths(parameters["coverage_threshold_m"])))
    return lines


def _has_history_tag() -> bool:
    """The record-history tag lives in the audit part of this app; the panel shows it once
    it is there rather than failing the whole dataset page without it."""
    try:
        return importlib.util.find_spec("labbook.provenance.templatetags.audit") is not None
    except ModuleNotFoundError:
        return False


def panel_context(record: AcquiredFile) -> Panel:
    found = queries.provenance_of(record)
    cleaning_prep = None if found.cleaning_step is None else found.cleaning_step.preparation_id
    preparations = [
        PreparationView(
            preparation=p,
            steps=[step_view(s) for s in p.steps.all()],
            holds_cleaning=p.pk == cleaning_prep,
        )
        for p in found.preparations
    ]
    neighbours = [
        NeighbourView(key, n.label, n.basis, n.count, n.files)
        for key, n in found.neighbours.items()
    ]
    info = found.processing
    processing = [
        ("Reader", info["reader"] or "—"),
        ("Software", info["software"]),
        ("Statistics of", info["statistics_channel"] or "—"),
    ]
    if info["levelling"]:
        processing.append(("Levelling", "plane fit removed before the statistics"))
    processing.extend(_parameter_lines(info["parameters"]))
    processing.append(("Preview", "made" if info["thumbnail"] else "none"))
    return Panel(
        found=found,
        surface=[_coverage_text(c) for c in found.coverages],
        preparations=preparations,
        neighbours=neighbours,
        processing=processing,
        stale=[_STALE[s] for s in found.stale],
        history_tag=_has_history_tag(),
        processed_at=info["processed_at"],
    )
