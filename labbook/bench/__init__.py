"""Benchmarks: each measures a labbook job and its floor (what plain libraries manage for the
same job) back to back in one run, and reports the ratio (PERFORMANCE.md explains why ratios:
absolute times on shared machines move by 5-45 % between runs).

Run with ``make bench`` or ``python -m labbook.bench [NAME ...]``. They run in a throwaway
test database on whatever DATABASE_URL points at, never on the lab's own data.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass


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

    def as_dict(self) -> dict:
        return {**asdict(self), "ratio": self.ratio, "met": self.met}


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
