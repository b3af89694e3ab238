"""Ingesting from the file system: explicit paths (``manage.py ingest``) and a watched folder
(``manage.py watch``). A file is taken only once it is complete (its size and modification time
have not changed for a settling period), and ingestion is idempotent by SHA-256, so a watcher
that restarts simply scans again: what arrived while it was down is picked up, what it already
took is recognised (a small state file spares re-hashing unchanged files)."""

from __future__ import annotations

import json
import logging
import os
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from labbook.datafiles.actions import ingest
from labbook.datafiles.storage import UploadTooLarge

log = logging.getLogger(__name__)

# Names acquisition programs and copy tools use while a file is still being written.
_INCOMPLETE_SUFFIXES = (".part", ".tmp", ".crdownload", ".partial", "~")
STATE_FILE = ".labbook-watch.json"


def _candidate(path: Path) -> bool:
    name = path.name
    return not (
        name.startswith(".") or name.endswith(_INCOMPLETE_SUFFIXES) or name.endswith(".json")
    )


def files_under(paths: list[Path]) -> Iterator[Path]:
    """Files given, and every file below the directories given (sidecar .json files are read
    with their data file, not ingested on their own)."""
    for path in paths:
        if path.is_dir():
            for root, dirs, names in os.walk(path):
                dirs[:] = sorted(d for d in dirs if not d.startswith("."))
                for name in sorted(names):
                    candidate = Path(root) / name
                    if _candidate(candidate):
                        yield candidate
        elif path.is_file():
            yield path


def _sidecar(path: Path) -> dict:
    for candidate in (path.with_name(path.name + ".json"), path.with_suffix(".json")):
        if candidate.is_file():
            try:
                value = json.loads(candidate.read_text())
            except (OSError, ValueError) as exc:
                log.warning("ignoring unreadable sidecar %s: %s", candidate, exc)
                return {}
            return value if isinstance(value, dict) else {}
    return {}


@dataclass
class IngestReport:
    created: list[tuple[Path, int, str]] = field(default_factory=list)
    existing: list[tuple[Path, int]] = field(default_factory=list)
    failed: list[tuple[Path, str]] = field(default_factory=list)


def ingest_paths(
    paths: list[Path],
    *,
    actor,
    instrument=None,
    metadata: dict | None = None,
    source: str = "ingest",
) -> IngestReport:
    report = IngestReport()
    for path in files_under(paths):
        given = {**_sidecar(path), **(metadata or {})}
        try:
            with path.open("rb") as handle:
                result = ingest(
                    handle,
                    path.name,
                    metadata=given,
                    actor=actor,
                    source=source,
                    source_path=str(path),
                    instrument=instrument,
                    keep_oversized=True,
                )
        except (OSError, UploadTooLarge, ValueError) as exc:
            report.failed.append((path, str(exc)))
            continue
        if result.created:
            result.file.refresh_from_db()
            report.created.append((path, result.file.pk, result.file.status))
        else:
            report.existing.append((path, result.file.pk))
    return report


class FolderWatch:
    """Polls a folder; takes each file once it has settled. State survives restarts."""

    def __init__(
        self,
        folder: Path,
        *,
        actor,
        instrument=None,
        settle_s: float = 5.0,
        state_path: Path | None = None,
    ) -> None:
        self.folder = folder
        self.actor = actor
        self.instrument = instrument
        self.settle_s = settle_s
        self.state_path = state_path or folder / STATE_FILE
        self.seen: dict[str, list] = self._load_state()
        self.pending: dict[str, tuple[int, float, float]] = {}  # path -> (size, mtime, since)

    def _load_state(self) -> dict[str, list]:
        try:
            value = json.loads(self.state_path.read_text())
        except (OSError, ValueError):
            return {}
        return value if isinstance(value, dict) else {}

    def _save_state(self) -> None:
        temporary = self.state_path.with_name(self.state_path.name + ".new")
        temporary.write_text(json.dumps(self.seen))
        os.replace(temporary, self.state_path)

    def scan(self, now: float | None = None) -> IngestReport:
        """One pass: returns what was ingested in it."""
        now = time.monotonic() if now is None else now
        ready: list[Path] = []
        for path in files_under([self.folder]):
            if path == self.state_path:
                continue
            try:
                info = path.stat()
            except OSError:
                continue
            key = str(path)
            signature = [info.st_size, info.st_mtime_ns]
            if self.seen.get(key) == signature:
                continue
            previous = self.pending.get(key)
            if previous is None or (previous[0], previous[1]) != (info.st_size, info.st_mtime_ns):
                self.pending[key] = (info.st_size, info.st_mtime_ns, now)
                if self.settle_s > 0:
                    continue
            if now - self.pending[key][2] >= self.settle_s and info.st_size > 0:
                ready.append(path)
        report = ingest_paths(ready, actor=self.actor, instrument=self.instrument, source="watch")
        for path, *_ in report.created + report.existing:
            info = path.stat()
            self.seen[str(path)] = [info.st_size, info.st_mtime_ns]
            self.pending.pop(str(path), None)
        if ready:
            self._save_state()
        return report
