"""Integrity of the stored bytes: each file is re-hashed and compared with the SHA-256 recorded
when it arrived. Nothing is deleted or rewritten; a changed or missing file is reported."""

from __future__ import annotations

from dataclasses import dataclass, field

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
    return report
