"""Background work that survives a broker outage: a row first, then a message after commit.

An app registers a handler for a job kind; ``enqueue`` writes the pending row and, once the
transaction commits, asks Celery to run it. The handler must be idempotent: a job can run twice
when a worker is killed after the work but before the acknowledgement.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

from django.db import transaction
from django.utils import timezone

from labbook.core.models import Job

log = logging.getLogger(__name__)

JobHandler = Callable[[Job], Any]
_handlers: dict[str, JobHandler] = {}


class UnknownJobKind(LookupError):
    pass


def job_handler(kind: str) -> Callable[[JobHandler], JobHandler]:
    """Register ``func(job) -> result`` as the worker side of ``kind``."""

    def register(func: JobHandler) -> JobHandler:
        _handlers[kind] = func
        return func

    return register


def handler_for(kind: str) -> JobHandler:
    try:
        return _handlers[kind]
    except KeyError:
        raise UnknownJobKind(f"no handler is registered for job kind {kind!r}") from None


def enqueue(kind: str, params: dict | None = None, *, actor=None) -> Job:
    """Record the work as a pending job and queue it once the surrounding transaction commits."""
    handler_for(kind)  # fail now, in the caller's request, not later in a worker
    job = Job.objects.create(kind=kind, params=params or {}, created_by=actor)
    transaction.on_commit(lambda: dispatch(job.pk))
    return job


def dispatch(job_id: int) -> bool:
    """Send the job to the broker. A broker outage is logged, not raised: the sweep retries."""
    from labbook.core.tasks import run_job

    Job.objects.filter(pk=job_id).update(queued_at=timezone.now())
    try:
        run_job.delay(job_id)
    except Exception:  # noqa: BLE001 - any broker failure leaves the row pending for the sweep
        log.warning("could not queue job %s; the sweep will queue it again", job_id, exc_info=True)
        return False
    return True


@job_handler("worker_round_trip")
def _worker_round_trip(job: Job) -> dict:
    """Proves that a worker runs our code against our database; used by health diagnostics."""
    import os
    import socket

    return {"host": socket.gethostname(), "pid": os.getpid(), "job": job.pk}
