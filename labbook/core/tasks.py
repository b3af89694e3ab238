from __future__ import annotations

import logging
from collections.abc import Callable
from datetime import datetime, timedelta

from celery import shared_task
from django.conf import settings
from django.db import transaction
from django.db.models import Q
from django.utils import timezone

from labbook.core.jobs import dispatch, handler_for
from labbook.core.models import Job

log = logging.getLogger(__name__)

# Sweepers return how many rows they re-queued. Apps whose own rows carry a pending state
# (an acquired file waiting for its thumbnail) add theirs here from their AppConfig.ready().
pending_sweepers: dict[str, Callable[[datetime], int]] = {}


# The outcome is kept on the Job row, so no result is stored: publishing one would subscribe to
# the result backend and stall the sender for ~19 s whenever Redis is down.
@shared_task(
    bind=True,
    acks_late=True,
    ignore_result=True,
    autoretry_for=(ConnectionError, TimeoutError),
    retry_backoff=True,
    retry_backoff_max=300,
    max_retries=5,
)
def run_job(self, job_id: int) -> dict:
    """Run one job. Locks the row so two deliveries never run it twice at once; a job that
    is already done (a redelivery after the worker died) returns at once."""
    with transaction.atomic():
        job = Job.objects.select_for_update().filter(pk=job_id).first()
        if job is None:
            return {"job": job_id, "state": "missing"}
        if job.state in (Job.State.DONE, Job.State.FAILED):
            return {"job": job_id, "state": job.state, "result": job.result}
        if job.state == Job.State.RUNNING:
            # Another delivery holds it; the sweep resets it if that worker has died.
            return {"job": job_id, "state": job.state}
        job.state = Job.State.RUNNING
        job.attempts += 1
        job.started_at = timezone.now()
        job.save(update_fields=["state", "attempts", "started_at"])
    try:
        result = handler_for(job.kind)(job)
    except Exception as exc:  # noqa: BLE001 - the outcome is recorded on the row, not lost
        log.exception("job %s (%s) failed", job.pk, job.kind)
        Job.objects.filter(pk=job.pk).update(
            state=Job.State.FAILED, error=f"{type(exc).__name__}: {exc}", finished_at=timezone.now()
        )
        return {"job": job_id, "state": Job.State.FAILED, "error": str(exc)}
    Job.objects.filter(pk=job.pk).update(
        state=Job.State.DONE, result=result, error="", finished_at=timezone.now()
    )
    return {"job": job_id, "state": Job.State.DONE, "result": result}


@shared_task(acks_late=True)
def sweep_pending_work() -> dict[str, int]:
    """Queue again whatever was recorded but not finished: jobs never queued (broker down) and
    jobs left running by a worker that died. Runs from beat every few minutes."""
    stale = timezone.now() - timedelta(seconds=settings.LABBOOK_SWEEP_AFTER_SECONDS)
    waiting = Job.objects.filter(
        Q(state=Job.State.PENDING, queued_at__isnull=True, created_at__lt=stale)
        | Q(state=Job.State.PENDING, queued_at__lt=stale)
        | Q(
            state=Job.State.RUNNING,
            started_at__lt=stale - timedelta(seconds=settings.CELERY_TASK_TIME_LIMIT),
        )
    )
    counts = {"jobs": 0}
    for job_id in waiting.values_list("pk", flat=True)[:1000]:
        # A job left running by a dead worker goes back to pending so that run_job takes it.
        Job.objects.filter(pk=job_id, state=Job.State.RUNNING).update(state=Job.State.PENDING)
        dispatch(job_id)
        counts["jobs"] += 1
    for name, sweeper in pending_sweepers.items():
        counts[name] = sweeper(stale)
    return counts


#: Where jobs write the files they make (a crate's ZIP): exports, made again on request. Only
#: names under it are deleted with their job; an acquired file never is.
EXPORTS_PREFIX = "exports/"


@shared_task
def prune_finished_jobs(days: int = 90) -> int:
    """Finished jobs are bookkeeping, not records; keep three months of them. A file a job
    wrote as its output (``result["storage_name"]`` under ``exports/``) goes with it."""
    from django.core.files.storage import default_storage

    cutoff = timezone.now() - timedelta(days=days)
    finished = Job.objects.filter(state=Job.State.DONE, finished_at__lt=cutoff)
    for result in finished.values_list("result", flat=True):
        name = result.get("storage_name") if isinstance(result, dict) else None
        if isinstance(name, str) and name.startswith(EXPORTS_PREFIX) and ".." not in name:
            default_storage.delete(name)
    deleted, _ = finished.delete()
    return deleted


@shared_task
def worker_probe() -> dict:
    """A round trip through broker, worker, database and result backend, for health checks
    and the CI test that a real worker runs our code."""
    from django.db import connection

    with connection.cursor() as cursor:
        cursor.execute("SELECT 1")
        cursor.fetchone()
    return {"database": connection.vendor, "jobs": Job.objects.count()}
