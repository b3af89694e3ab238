"""Cryostats on synthetic level logs whose boil-off rate and refill times are known."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from labbook.cryo import actions
from labbook.demo.instruments import insert_readings
from labbook.instruments.actions import create_channel

#: A Wednesday noon: the synthetic logs end here.
NOW = datetime(2026, 3, 11, 12, 0, tzinfo=UTC)
CAPACITY_L = 12.0
RATE_L_PER_DAY = 3.0
HALF_HOUR = 1800


def synthetic_level(
    *,
    now: datetime = NOW,
    days: int = 14,
    rate_l_per_day: float = RATE_L_PER_DAY,
    capacity_l: float = CAPACITY_L,
    refill_every_days: float = 2.5,
    noise_pct: float = 0.25,
    seed: int = 3,
    rate_after: tuple[float, float] | None = None,
) -> tuple[np.ndarray, np.ndarray, list[float]]:
    """(t, level %, refill times): linear boil-off at a known rate, refilled to 95 % every
    ``refill_every_days``, with read-out noise; ``rate_after=(t0, rate)`` changes the rate
    from ``t0`` on (a degraded vacuum)."""
    end = int(now.timestamp()) // HALF_HOUR * HALF_HOUR
    t = np.arange(end - days * 86400, end + 1, HALF_HOUR, dtype=np.int64)
    rng = np.random.default_rng(seed)
    refills = list(np.arange(t[0] + 0.6 * 86400, t[-1] - 0.6 * 86400, refill_every_days * 86400))
    level = np.empty(t.shape)
    pct = 95.0
    last = t[0]
    idx = 0
    for i, ti in enumerate(t):
        rate = rate_l_per_day
        if rate_after is not None and ti >= rate_after[0]:
            rate = rate_after[1]
        pct -= rate / capacity_l * 100.0 * (ti - last) / 86400.0
        last = ti
        while idx < len(refills) and ti >= refills[idx]:
            pct = 95.0
            idx += 1
        level[i] = pct
    level = level + noise_pct * rng.standard_normal(t.shape)
    return t, np.clip(level, 0, 100), [float(r) for r in refills]


@pytest.fixture
def level_channel(instrument, manager):
    return create_channel(
        instrument,
        name="LHe bath level",
        quantity="cryogen_level",
        unit="%",
        actor=manager,
        expected_interval_s=HALF_HOUR,
    )


@pytest.fixture
def flow_channel(instrument, manager):
    return create_channel(
        instrument, name="He recovery flow", quantity="other", unit="L/min", actor=manager
    )


@pytest.fixture
def oxygen_channel(instrument, manager):
    return create_channel(instrument, name="room oxygen", quantity="other", unit="%", actor=manager)


@pytest.fixture
def cryostat(instrument, level_channel, manager):
    return actions.create_cryostat(
        instrument,
        level_channel=level_channel,
        actor=manager,
        name="LHe bath",
        cryogen="LHe",
        capacity_l=CAPACITY_L,
        minimum_l=1.5,
        price_per_l=14.0,
        room_volume_m3=60.0,
        transfer_dewar_l=100.0,
    )


@pytest.fixture
def now():
    """The real clock: the API and pages forecast from timezone.now()."""
    from django.utils import timezone

    return timezone.now()


@pytest.fixture
def logged(cryostat, now):
    """The cryostat with two weeks of synthetic readings ending now."""
    t, level, _ = synthetic_level(now=now)
    insert_readings(cryostat.level_channel_id, t, level)
    return cryostat


def at(t_s: float) -> datetime:
    return datetime.fromtimestamp(t_s, UTC)


__all__ = ["NOW", "at", "synthetic_level", "timedelta"]
