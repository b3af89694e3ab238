"""Integrity of the stored bytes: each file is re-hashed and compared with the SHA-256 recorded
when it arrived. Nothing is deleted or rewritten; a changed or missing file is reported."""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from django.conf import settings

from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.storage import verify_stored


@dataclass(frozen=True)
class Problem:
    file_id: int
    name: str
    sha256: str
    state: str  # "changed" or "missing"


@dataclass
class IntegrityReport:
    checked: int = 0
    ok: int = 0
    problems: list[Problem] = field(default_factory=list)

    @property
    def changed(self) -> list[Problem]:
        return [p for p in self.problems if p.state == "changed"]

    @property
    def missing(self) -> list[Problem]:
        return [p for p in self.problems if p.state == "missing"]


def verify_all() -> IntegrityReport:
    report = IntegrityReport()
    rows = AcquiredFile.objects.order_by("pk").values_list(
        "pk", "original_name", "sha256", "storage_name"
    )
    for file_id, name, sha256, storage_name in rows.iterator(chunk_size=500):
        state = verify_stored(storage_name, sha256)
        report.checked += 1
        if state == "ok":
            report.ok += 1
        else:
            report.problems.append(Problem(file_id, name, sha256, state))
    _keep(report)
    return report


def _report_path() -> Path:
    return Path(settings.DATA_DIR) / "integrity" / "latest.json"


def _keep(report: IntegrityReport) -> None:
    """The latest run, for the integrity page; written whole, then renamed into place."""
    path = _report_path()
    path.parent.mkdir(parents=True, exist_ok=True)
    body = {
        "checked_at": datetime.now(UTC).isoformat(),
        "checked": report.checked,
        "ok": report.ok,
        "problems": [asdict(problem) for problem in report.problems],
    }
    partial = path.with_suffix(".partial")
    partial.write_text(json.dumps(body), encoding="utf-8")
    os.replace(partial, path)


def latest_report() -> dict[str, Any] | None:
    """The last run's findings (``checked_at`` as an aware datetime), or None before the first."""
    try:
        body = json.loads(_report_path().read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    body["checked_at"] = datetime.fromisoformat(body["checked_at"])
    return body
