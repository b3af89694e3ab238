"""Celery tasks of acquired files: they take ids, lock the row and are idempotent; the sweep
queues again whatever is still pending (a broker outage or a killed worker)."""

from __future__ import annotations

import logging
import math
from datetime import datetime

import numpy as np
from celery import shared_task
from django.core.files.base import ContentFile
from django.core.files.storage import default_storage
from django.db import OperationalError, transaction
from django.db.models import F
from django.utils import timezone

from labbook.datafiles import lineage, processing
from labbook.datafiles.actions import queue_processing, replace_coverages, store_lineage
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.readers import ReaderError, detect_format, read_file
from labbook.datafiles.storage import read_stored, thumbnail_name

log = logging.getLogger(__name__)

HDF5_READ_TIMEOUT_S = 60


#: After this many failed attempts (not the file's fault: a bug, a full disk) the dataset is
#: marked unreadable with the error, its bytes kept, so the sweep stops retrying it.
MAX_ATTEMPTS = 5


# The outcome is kept on the row, so no result is stored: publishing one would subscribe to the
# result backend and stall the uploader for ~19 s whenever Redis is down.
@shared_task(
    bind=True,
    acks_late=True,
    ignore_result=True,
    autoretry_for=(OperationalError, ConnectionError, TimeoutError),
    retry_backoff=True,
    retry_backoff_max=300,
    max_retries=5,
)
def process_file(self, file_id: int) -> str:
    """Read, measure and link one stored file (see ``_process``). A failure that is not the
    file's (a bug, a full disk) is recorded on the row, never only in a log."""
    try:
        return _process(file_id)
    except (OperationalError, ConnectionError, TimeoutError):
        raise  # retried by Celery; the row stays pending
    except Exception as exc:  # noqa: BLE001 - recorded on the row, then the sweep may retry
        log.exception("processing file %s failed", file_id)
        record = AcquiredFile.objects.filter(pk=file_id).first()
        if record is None:
            return "missing"
        attempts = record.attempts + 1
        update = {
            "attempts": attempts,
            "error": f"processing failed: {type(exc).__name__}: {exc}"[:5000],
        }
        if attempts >= MAX_ATTEMPTS:
            update["status"] = AcquiredFile.Status.UNREADABLE
        AcquiredFile.objects.filter(pk=file_id, status=AcquiredFile.Status.PENDING).update(**update)
        return "failed"


def _process(file_id: int) -> str:
    """Read, measure and link one stored file. The row is locked while it is claimed, so two
    deliveries of the same message never process it twice; a file already done is left alone.
    An unreadable file keeps its bytes and gets the reader's error."""
    # One query for the row and what the lineage needs of it (uploader, instrument).
    record = (
        AcquiredFile.objects.select_related("uploaded_by", "instrument").filter(pk=file_id).first()
    )
    if record is None or record.status != AcquiredFile.Status.PENDING:
        return "missing" if record is None else record.status
    # No lock is held while the file is read and measured: two deliveries of the same message
    # may both do the work, and the first to write its result wins (the write below checks
    # the row is still pending under a lock). Holding a lock across the work would cost a
    # transaction per file for a case that is rare.

    data = read_stored(record.storage_name)
    # libhdf5 can loop forever or crash on a corrupt file, out of Python's reach: HDF5 files
    # are read in a child process that is killed after a minute (about 40 ms per file more).
    isolate = detect_format(record.original_name, data[:4096]) == "hdf5"
    try:
        parsed = read_file(
            record.original_name,
            data,
            metadata=record.given_metadata,
            timeout_s=HDF5_READ_TIMEOUT_S if isolate else None,
        )
        analysis = processing.analyse(parsed, record.given_metadata)
    except (ReaderError, ValueError) as exc:
        AcquiredFile.objects.filter(pk=file_id, status=AcquiredFile.Status.PENDING).update(
            attempts=F("attempts") + 1,
            status=AcquiredFile.Status.UNREADABLE,
            error=str(exc)[:5000],
            reader=getattr(exc, "reader", "") or "",
            processed_at=timezone.now(),
        )
        return AcquiredFile.Status.UNREADABLE

    thumb = ""
    if analysis.thumbnail is not None:
        thumb = thumbnail_name(record.sha256)
        if not default_storage.exists(thumb):
            default_storage.save(thumb, ContentFile(analysis.thumbnail))

    metadata = _jsonable(analysis.metadata)
    acquired_at = processing.acquired_at_of(analysis.metadata)
    if acquired_at is None:
        # No time in the file or the upload: its arrival is the best estimate, and is said so.
        acquired_at = record.created_at
        metadata["acquired_at_assumed"] = "arrival"
    found = lineage.resolve(
        acquired_at=acquired_at,
        metadata=metadata,
        instrument=record.instrument,
        uploaded_by=record.uploaded_by,
    )
    with transaction.atomic():
        # Lock the row and re-read only its status, version and attempts. Unchanged since it
        # was read above (the usual case), that row is saved; changed (a correction), it is
        # read again in full so that nothing of the change is lost.
        status, updated_at, attempts = (
            AcquiredFile.objects.select_for_update()
            .filter(pk=file_id)
            .values_list("status", "updated_at", "attempts")
            .get()
        )
        if status != AcquiredFile.Status.PENDING:
            return status
        current = record
        if updated_at != record.updated_at:
            current = AcquiredFile.objects.select_for_update().get(pk=file_id)
        current.attempts = attempts + 1
        current.kind = analysis.kind
        current.acquired_at = acquired_at
        current.bias_v = _number(metadata.get("bias_v"))
        current.setpoint_a = _number(metadata.get("setpoint_a"))
        current.temperature_k = _number(metadata.get("temperature_k"))
        current.channel_name = str(metadata.get("channel_name") or "")[:100]
        current.metadata = metadata
        current.raw_header = _jsonable(parsed.raw_header)
        current.reader = parsed.reader[:50]
        current.stats = _jsonable(analysis.stats)
        current.thumbnail_name = thumb
        current.status = AcquiredFile.Status.READY
        current.error = "\n".join(parsed.warnings)[:5000]
        current.processed_at = timezone.now()
        # Coverage rows are only ever written with a resolved lineage (here, by a correction
        # or a re-resolution), so a row never resolved has none to delete.
        first_lineage = current.lineage_resolved_at is None
        store_lineage(current, found)
        current._history_user = None
        current.save()
        replace_coverages(current, found.coverages, first=first_lineage)
    return AcquiredFile.Status.READY


def _number(value) -> float | None:
    return float(value) if isinstance(value, int | float) and not isinstance(value, bool) else None


_PLAIN = (str, int, bool, type(None))


def _jsonable(value):
    """JSON-ready: datetimes as ISO text, numpy scalars as numbers (header values vary)."""
    kind = type(value)
    if kind in _PLAIN:  # most values (a histogram is 256 ints): no further checks
        return value
    if kind is float:
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    return value


def sweep_pending_files(stale: datetime) -> int:
    """Queue again every file still pending whose message is older than ``stale``."""
    from labbook.datafiles.queries import pending_files

    count = 0
    for file_id in pending_files(stale).values_list("pk", flat=True)[:1000]:
        queue_processing(file_id)
        count += 1
    return count


@shared_task(acks_late=True)
def verify_stored_files() -> dict:
    """Periodic integrity check (beat): re-hash every stored file; problems go to the log and
    to the lab managers by email. Nothing is deleted."""
    from django.contrib.auth import get_user_model
    from django.core.mail import send_mail

    from labbook.datafiles.integrity import verify_all

    report = verify_all()
    if report.problems:
        lines = [f"{p.state} #{p.file_id} {p.name} {p.sha256}" for p in report.problems]
        log.error("stored files changed or missing:\n%s", "\n".join(lines))
        managers = (
            get_user_model()
            .objects.filter(groups__name="managers", is_active=True)
            .exclude(email="")
        )
        recipients = sorted(set(managers.values_list("email", flat=True)))
        if recipients:
            send_mail(
                f"labbook: {len(report.problems)} stored file(s) changed or missing",
                "These stored files no longer match the SHA-256 recorded at ingestion:\n\n"
                + "\n".join(lines),
                None,
                recipients,
                fail_silently=True,
            )
    return {
        "checked": report.checked,
        "changed": len(report.changed),
        "missing": len(report.missing),
    }
