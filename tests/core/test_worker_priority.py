"""Workers run at a lower CPU priority than the web processes (settings LABBOOK_WORKER_NICE):
checked in a fresh interpreter, since a process cannot take back a priority it gave up."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PROBE = (
    "import os, django; django.setup(); "
    "from celery.signals import worker_init; import labbook.celery; "
    "before = os.nice(0); worker_init.send(sender=None); print(before, os.nice(0))"
)


def _niceness(**env: str) -> tuple[int, int]:
    result = subprocess.run(
        [sys.executable, "-c", PROBE],
        cwd=ROOT,
        env={**os.environ, "DJANGO_SETTINGS_MODULE": "labbook.settings", **env},
        capture_output=True,
        text=True,
        timeout=120,
        check=True,
    )
    before, after = result.stdout.split()[-2:]
    return int(before), int(after)


def test_a_worker_lowers_its_cpu_priority_before_it_starts():
    before, after = _niceness(LABBOOK_WORKER_NICE="10")
    if before >= 10:
        pytest.skip(f"this test process already runs at niceness {before}")
    assert after == 10


def test_a_worker_priority_of_zero_leaves_it_alone():
    before, after = _niceness(LABBOOK_WORKER_NICE="0")
    assert after == before
