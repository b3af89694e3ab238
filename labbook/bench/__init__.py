"""Benchmarks: each measures a labbook job and its floor (what plain libraries manage for the
same job) back to back in one run, and reports the ratio (PERFORMANCE.md explains why ratios:
absolute times on shared machines move by 5-45 % between runs).

Run with ``make bench`` or ``python -m labbook.bench [NAME ...]``. They run in a throwaway
test database on whatever DATABASE_URL points at, never on the lab's own data.
"""

from __future__ import annotations

import json
import os
import platform
import socket
import statistics
import sys
import time
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path


@dataclass(frozen=True)
class Figure:
    name: str
    value: float
    unit: str
    floor: float
    floor_name: str
    goal_ratio: float | None = None  # the ratio to stay under, where the issues set one
    goal_value: float | None = None  # an absolute bound in ``unit``, where the issues set one

    @property
    def ratio(self) -> float:
        return self.value / self.floor if self.floor else float("inf")

    @property
    def met(self) -> bool | None:
        checks = []
        if self.goal_ratio is not None:
            checks.append(self.ratio <= self.goal_ratio)
        if self.goal_value is not None:
            checks.append(self.value <= self.goal_value)
        return all(checks) if checks else None

    @property
    def goal(self) -> str | None:
        """The goal as text (``≤ 2×, ≤ 100 ms``), None where the issues set none."""
        goals = []
        if self.goal_ratio is not None:
            goals.append(f"≤ {self.goal_ratio:g}×")
        if self.goal_value is not None:
            goals.append(f"≤ {self.goal_value:g} {self.unit}")
        return ", ".join(goals) or None

    def as_dict(self) -> dict:
        ratio = self.ratio
        return {
            **asdict(self),
            "floor_label": self.floor_name,
            # JSON has no infinity: a floor of zero (nothing to compare with) is written null.
            "ratio": ratio if ratio != float("inf") else None,
            "goal": self.goal,
            "met": self.met,
            "passed": self.met,
        }


def machine() -> dict:
    """Where and when figures were measured: they only compare within one machine and run."""
    try:
        load = list(os.getloadavg())
    except OSError:  # pragma: no cover - platforms without getloadavg
        load = None
    return {
        "host": socket.gethostname(),
        "platform": platform.platform(),
        "python": sys.version.split()[0],
        "cpus": os.cpu_count(),
        "load_average": load,
        "measured_at": datetime.now(UTC).isoformat(timespec="seconds"),
    }


def write_figures(path: Path, figures: Iterable[Figure], **extra) -> Path:
    """Write figures with the machine and time as JSON (atomically: a reader never sees half)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    figures = list(figures)
    document = {
        "machine": machine(),
        **extra,
        "figures": [figure.as_dict() for figure in figures],
        "passed": not any(figure.met is False for figure in figures),
    }
    partial = path.with_name(path.name + ".partial")
    partial.write_text(json.dumps(document, indent=2, default=str) + "\n")
    partial.replace(path)
    return path


BenchFunction = Callable[[], list[Figure]]
registry: dict[str, BenchFunction] = {}


def benchmark(name: str) -> Callable[[BenchFunction], BenchFunction]:
    def register(func: BenchFunction) -> BenchFunction:
        registry[name] = func
        return func

    return register


def p50_ms(func: Callable[[], object], *, repeat: int = 200, warmup: int = 20) -> float:
    """Median wall time of ``func`` in milliseconds."""
    for _ in range(warmup):
        func()
    samples = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        samples.append((time.perf_counter() - start) * 1000)
    return statistics.median(samples)
