"""The logbook tests use the tips of tests/tips and a Cu(111) crystal."""

from __future__ import annotations

import pytest

from labbook.samples import actions as sample_actions
from tests.tips.conftest import other_tip, tip  # noqa: F401 - fixtures shared with the tips tests


@pytest.fixture
def crystal(member):
    return sample_actions.create_sample(name="Cu(111) #3", substrate="Cu(111)", actor=member)
