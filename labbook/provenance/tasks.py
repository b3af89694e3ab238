"""Celery tasks of lineage resolution, PROV-JSON and RO-Crate exports, integrity checks: they take
ids, lock the row and are idempotent.

A correction that touches many datasets (a mount that covered months of scans) re-resolves them
here, as a durable job, instead of holding up the request that made it (audit.py decides).
"""

from __future__ import annotations

import logging

from django.contrib.auth import get_user_model
from django.db import transaction

from labbook.core.jobs import job_handler
from labbook.core.models import Job

log = logging.getLogger(__name__)

#: The job kind of a large re-resolution; params are {"model": app label.Model, "pk": the
#: corrected record, "files": dataset ids, "actor": user id or None, "reason": history text}.
RERESOLVE_JOB = "provenance.reresolve"
#: Datasets re-resolved per transaction: the rows of one batch stay locked until it commits
#: (~100 ms a dataset), so a batch is kept to a few seconds.
BATCH_SIZE = 50


class ReresolveIncomplete(RuntimeError):
    """Some datasets could not be re-resolved; the others were, and running the job again is
    safe (only datasets whose lineage changes are saved)."""


@job_handler(RERESOLVE_JOB)
def reresolve_files_job(job: Job) -> dict:
    """Re-resolve the datasets a correction touched, in batches, as the person who made it.

    Idempotent: a dataset whose lineage is already up to date is left alone (no save, no
    history row), so a redelivery or a second run changes nothing more.
    """
    from labbook.provenance.audit import reresolve_file

    params = job.params or {}
    try:
        ids = sorted({int(i) for i in params.get("files", [])})
    except (TypeError, ValueError) as exc:
        raise ValueError(f"job {job.pk}: files must be a list of dataset ids") from exc
    actor_id = params.get("actor")
    actor = get_user_model().objects.filter(pk=actor_id).first() if actor_id else None
    reason = str(params.get("reason") or "lineage resolved again after a correction")
    changed = 0
    failed: list[int] = []
    for start in range(0, len(ids), BATCH_SIZE):
        with transaction.atomic():
            for file_id in ids[start : start + BATCH_SIZE]:
                try:
                    # reresolve_file is atomic itself: a failure rolls back only that dataset.
                    changed += bool(reresolve_file(file_id, actor=actor, reason=reason))
                except Exception:  # noqa: BLE001 - one dataset never stops the others
                    log.exception("job %s: could not re-resolve file %s", job.pk, file_id)
                    failed.append(file_id)
        # Progress on the row, for whoever watches a long job; the outcome replaces it.
        Job.objects.filter(pk=job.pk).update(
            result={"files": len(ids), "done": min(start + BATCH_SIZE, len(ids))}
        )
    if failed:
        shown = ", ".join(str(i) for i in failed[:20])
        more = f" and {len(failed) - 20} more" if len(failed) > 20 else ""
        raise ReresolveIncomplete(
            f"{len(failed)} of {len(ids)} datasets could not be re-resolved "
            f"({changed} changed): files {shown}{more}"
        )
    return {"files": len(ids), "changed": changed}
