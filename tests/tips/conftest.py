"""Tips of the invented lab: an etched W tip for STM and a cut PtIr tip on a tuning fork."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from labbook.tips import actions

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)


@pytest.fixture
def tip(member):
    return actions.create_tip(
        name="W-12",
        material="W",
        origin="etched",
        preparation="0.25 mm W wire, etched in 2 M NaOH at 8 V, drop-off cut-off",
        actor=member,
    )


@pytest.fixture
def other_tip(member):
    return actions.create_tip(
        name="PtIr-3",
        material="PtIr",
        origin="cut",
        sensor_kind="tuning_fork",
        resonance_frequency_hz=30_512.0,
        quality_factor=42_000.0,
        stiffness_n_per_m=1_900.0,
        stiffness_nominal_n_per_m=1_800.0,
        stiffness_method="thermal noise at 5 K",
        actor=member,
    )
