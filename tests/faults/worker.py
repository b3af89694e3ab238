"""A real labbook Celery worker (solo pool) with two test hooks, for the fault tests.

``FAULT_PAUSE_AT=analyse`` or ``=resolve`` makes the first file processed pause there for
``FAULT_PAUSE_S`` seconds after writing ``<FAULT_MARKER_DIR>/paused-<stage>``: the test kills
the worker while it waits, mid-task. ``analyse`` is before anything is written; ``resolve`` is
after the thumbnail is stored and before the row is written. Later calls pass straight
through, so the worker that takes over the task does the work.

``FAULT_VISIBILITY_S`` shortens how long Redis keeps an unacknowledged message before it is
delivered again (the production setting is 15 minutes), so the test can watch a redelivery.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "labbook.settings")
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import django  # noqa: E402

django.setup()

from labbook.celery import app  # noqa: E402
from labbook.datafiles import lineage, processing  # noqa: E402

STAGE = os.environ.get("FAULT_PAUSE_AT", "")
PAUSE_S = float(os.environ.get("FAULT_PAUSE_S", "120"))
MARKERS = Path(os.environ.get("FAULT_MARKER_DIR", "."))


def _pausing(stage: str, real):
    def call(*args, **kwargs):
        marker = MARKERS / f"paused-{stage}"
        if not marker.exists():
            marker.write_text(str(os.getpid()))
            time.sleep(PAUSE_S)
        return real(*args, **kwargs)

    return call


if STAGE == "analyse":
    processing.analyse = _pausing(STAGE, processing.analyse)
elif STAGE == "resolve":
    lineage.resolve = _pausing(STAGE, lineage.resolve)
elif STAGE:
    raise SystemExit(f"FAULT_PAUSE_AT={STAGE!r}: use analyse or resolve")

if os.environ.get("FAULT_VISIBILITY_S"):
    app.conf.broker_transport_options = {
        **app.conf.broker_transport_options,
        "visibility_timeout": float(os.environ["FAULT_VISIBILITY_S"]),
        "unacked_restore_interval": 1,
    }

if __name__ == "__main__":
    app.worker_main(
        [
            "worker",
            "--pool",
            "solo",
            "--without-mingle",
            "--without-gossip",
            "--loglevel",
            "WARNING",
            *sys.argv[1:],
        ]
    )
