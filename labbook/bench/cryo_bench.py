"""Cryogen analysis speed: refill detection, robust per-segment rate fits and the forecast over
five years of one-minute level readings (2.6 M points), against the 300 ms goal of issue 7 and
as a ratio to one numpy pass over the same readings measured in the same run.

No database is touched; registered as ``cryo``.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from datetime import UTC, datetime

import numpy as np

from labbook.bench import Figure, benchmark
from labbook.science.cryogen import LabCalendar, analyse, forecast

MINUTE = 60.0
YEARS = 5


def _level_log(seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """An invented LHe bath read once a minute for five years: 12 L filled to capacity when it
    nears 3 L, 30-minute transfers, boil-off 3-4.5 L/day changing from fill to fill, 0.03 L of
    meter noise and 3,000 single-reading spikes of 2-8 L."""
    rng = np.random.default_rng(seed)
    n = int(YEARS * 365 * 86_400 / MINUTE)
    level = np.empty(n)
    i = 0
    while i < n:
        rate = rng.uniform(3.0, 4.5)
        hold = int((12.0 - 3.0) / rate * 86_400 / MINUTE)
        stretch = min(hold, n - i)
        level[i : i + stretch] = 12.0 - rate * np.arange(stretch) * MINUTE / 86_400
        i += stretch
        fill = min(30, n - i)
        level[i : i + fill] = np.linspace(3.0, 12.0, fill)
        i += fill
    level += rng.normal(0.0, 0.03, n)
    spikes = rng.choice(n, 3000, replace=False)
    level[spikes] += rng.choice([-1.0, 1.0], spikes.size) * rng.uniform(2.0, 8.0, spikes.size)
    t = datetime(2021, 1, 1, tzinfo=UTC).timestamp() + np.arange(n) * MINUTE
    return t, level


def _interleaved_ms(*jobs: Callable[[], object], repeat: int, warmup: int = 2) -> list[float]:
    """Median wall time (ms) of each job, run in turn within every round, so a job and its
    floor see the same load on a shared machine."""
    for _ in range(warmup):
        for job in jobs:
            job()
    samples: list[list[float]] = [[] for _ in jobs]
    for _ in range(repeat):
        for job, times in zip(jobs, samples, strict=True):
            start = time.perf_counter()
            job()
            times.append((time.perf_counter() - start) * 1000)
    return [statistics.median(times) for times in samples]


@benchmark("cryo")
def cryo() -> list[Figure]:
    t, level = _level_log()
    calendar = LabCalendar()

    def analyse_and_forecast() -> None:
        result = analyse(t, level, min_rise_l=3.0)
        forecast(
            name="LHe",
            level_now_l=result.level_now_l,
            now=datetime.fromtimestamp(result.t_now, UTC),
            rate_l_per_day=result.rate_l_per_day,
            rate_uncertainty_l_per_day=result.rate_uncertainty_l_per_day,
            minimum_l=2.0,
            calendar=calendar,
        )

    ours_ms, median_ms, sort_ms = _interleaved_ms(
        analyse_and_forecast,
        lambda: np.median(level),
        lambda: np.sort(level),
        repeat=15,
    )
    label = f"analyse + forecast, {YEARS} years of 1-min LHe readings ({t.size / 1e6:.1f} M), p50"
    return [
        Figure(label, ours_ms, "ms", median_ms, "numpy.median of the same readings",
               goal_value=300.0),
        Figure(label, ours_ms, "ms", sort_ms, "numpy.sort of the same readings",
               goal_value=300.0),
    ]  # fmt: skip
