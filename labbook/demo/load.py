"""Load the demo lab, step by step.

``STEPS`` is the list later work extends (samples, preparations, tips, files, cryogen logs):
a step is a function ``(ctx: DemoContext) -> dict[str, int]`` that is idempotent on its own —
it gets or creates its records by natural keys, goes through the apps' actions acting as
``ctx.manager`` (or the person who did the work) so history names someone, reads what earlier
steps left in ``ctx``, and returns the totals of what it owns (the same numbers on every run).
Events that also show in the readings (refills, sputter cycles, sample loads, the bake-out)
come from :func:`labbook.demo.readings.plan` with ``ctx.scenario``, so records and logged
values tell the same story.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from typing import Protocol

from django.utils import timezone

from labbook.demo import DemoContext
from labbook.demo.cryo import load_cryostats
from labbook.demo.datasets import load_datasets
from labbook.demo.instruments import CHANNELS, ensure_instrument, insert_readings
from labbook.demo.logbook import load_logbook
from labbook.demo.people import ensure_people
from labbook.demo.readings import Scenario, bake_start_for, series, time_grid
from labbook.demo.samples import load_samples
from labbook.demo.tips import load_tips
from labbook.instruments.models import Instrument, Reading


class _Writer(Protocol):
    def write(self, text: str) -> object: ...


Step = Callable[[DemoContext], dict[str, int]]


# The story covers the year before LTM-1 was set up in labbook; it is anchored there.
STORY_DAYS = 365


def scenario_for(instrument: Instrument, now: datetime) -> Scenario:
    """The demo story for ``instrument``, anchored at a year before it was set up (or before
    ``now``, if that is earlier, as in tests that pass a fixed ``now``).

    Anchoring on the instrument's creation, not on the window asked for, keeps the story the
    same on every run: a run a month later appends a month that continues the same curves,
    and ``--days 730`` back-fills an earlier year without moving the bake-out.
    """
    story_end = min(instrument.created_at, now)
    return Scenario(
        bake_start_s=bake_start_for(story_end - timedelta(days=STORY_DAYS), instrument.time_zone),
        time_zone=instrument.time_zone,
    )


def load_readings(ctx: DemoContext) -> dict[str, int]:
    """Log the demo window on every channel, inserting only the instants a channel lacks.

    Every value is a function of the instant (labbook.demo.readings), so generating only the
    missing span gives the numbers a single run would have given.
    """
    ctx.scenario = scenario_for(ctx.instrument, ctx.now)
    total = added = 0
    for spec in CHANNELS:
        channel = ctx.channels[spec.name]
        grid = time_grid(ctx.start, ctx.now, spec.interval_s)
        have = Reading.objects.filter(channel=channel).order_by("t")
        first = have.values_list("t", flat=True).first()
        if first is not None:
            last = have.reverse().values_list("t", flat=True).first()
            # Only the instants outside the span already logged: a complete channel costs
            # two index probes on a re-run.
            grid = grid[(grid < int(first.timestamp())) | (grid > int(last.timestamp()))]
        new = insert_readings(channel.pk, grid, series(ctx.scenario, spec.series, grid))
        added += new
        total += Reading.objects.filter(channel=channel).count()
    ctx.report(f"readings: {total:,} on {len(CHANNELS)} channels ({added:,} new)")
    return {"readings": total}


STEPS: list[tuple[str, Step]] = [
    ("people", ensure_people),
    ("instrument", ensure_instrument),
    ("readings", load_readings),
    ("samples", load_samples),
    ("tips", load_tips),
    ("logbook", load_logbook),
    ("datasets", load_datasets),
    ("cryostats", load_cryostats),
]


def demo_window(now: datetime, days: int) -> tuple[datetime, datetime]:
    """[start, now]: ``days`` back from ``now``, the start put on UTC midnight so it lies on
    every logging interval's grid and the story's anchor is the first reading exactly."""
    if days < 1:
        raise ValueError("days must be at least 1")
    if now.tzinfo is None:
        raise ValueError("now must be an aware datetime")
    start = (now - timedelta(days=days)).astimezone(UTC)
    return start.replace(hour=0, minute=0, second=0, microsecond=0), now


def load_demo(
    stdout: _Writer | None = None, *, days: int = 365, now: datetime | None = None
) -> dict[str, int]:
    """Build (or complete) the demo lab; returns the totals of every step, e.g.
    ``{"users": 5, "instruments": 1, "chambers": 3, "channels": 8, "readings": …}``.
    Safe to run again: nothing is duplicated, and with the same ``now`` the counts are equal."""
    now = now or timezone.now()
    start, end = demo_window(now, days)

    def report(line: str) -> None:
        if stdout is not None:
            stdout.write(line + "\n")

    ctx = DemoContext(now=end, days=days, start=start, report=report)
    counts: dict[str, int] = {}
    for name, step in STEPS:
        began = time.perf_counter()
        counts.update(step(ctx))
        report(f"  ({name}: {time.perf_counter() - began:.1f} s)")
    return counts
