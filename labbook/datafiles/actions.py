"""Every change to acquired files: ingestion (upload, command, folder watch), processing
results, corrections. The bytes are stored before anything else happens, so nothing a later
step does can lose them."""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any, BinaryIO

from django.conf import settings
from django.core.exceptions import ValidationError
from django.db import IntegrityError, transaction
from django.utils import timezone

from labbook.accounts.permissions import require_member
from labbook.core.records import save_record
from labbook.datafiles import lineage
from labbook.datafiles.models import AcquiredFile, FileCoverage
from labbook.datafiles.storage import safe_display_name, store_stream

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class Ingested:
    file: AcquiredFile
    created: bool


def _check_metadata(metadata: Any) -> dict[str, Any]:
    if metadata in (None, ""):
        return {}
    if not isinstance(metadata, dict):
        raise ValidationError({"metadata": "must be a JSON object of metadata fields"})
    return metadata


def ingest(
    stream: BinaryIO,
    name: str,
    *,
    metadata: dict[str, Any] | None = None,
    actor,
    source: str = "upload",
    source_path: str = "",
    instrument=None,
    keep_oversized: bool = False,
) -> Ingested:
    """Store the bytes under their SHA-256 and record a pending dataset; processing is queued
    after commit. The same bytes again are the same dataset (``created`` is False).

    ``keep_oversized`` (``ingest``/``watch``): a file larger than the reader limit
    (``LABBOOK_MAX_UPLOAD_BYTES``; readers hold a file in memory) is stored all the same,
    streamed and hashed in chunks, and recorded ``unreadable`` with the reason, never
    processed. Without it (an HTTP upload, whose request body is bounded by the same cap)
    such a stream raises ``UploadTooLarge`` and nothing is kept."""
    require_member(actor)
    given = _check_metadata(metadata)
    stored = store_stream(stream, keep_oversized=keep_oversized)
    # Bytes new to the storage cannot have a dataset yet (and if one had lost its file, the
    # INSERT below meets its SHA-256 and answers with it): only bytes seen before are looked
    # up, and then only for an id before the whole row (a wide SELECT with JSON to decode).
    if stored.already_stored and AcquiredFile.objects.filter(sha256=stored.sha256).exists():
        return Ingested(AcquiredFile.objects.get(sha256=stored.sha256), created=False)
    record = AcquiredFile(
        sha256=stored.sha256,
        size_bytes=stored.size_bytes,
        storage_name=stored.storage_name,
        original_name=safe_display_name(name),
        source=source,
        source_path=source_path[:1000],
        uploaded_by=actor,
        given_metadata=given,
        instrument=instrument,
        # Queued on commit, just below: stamped in the INSERT rather than by an UPDATE of its
        # own (which was a third transaction, and a third fsync, per file).
        queued_at=timezone.now(),
    )
    if stored.oversized:
        record.status = AcquiredFile.Status.UNREADABLE
        record.queued_at = None
        record.processed_at = timezone.now()
        record.error = (
            f"larger than the reader limit of {settings.LABBOOK_MAX_UPLOAD_BYTES:,} bytes "
            f"(the file has {stored.size_bytes:,}); its bytes are kept, not read"
        )
    try:
        with transaction.atomic():
            # The uploader and instrument are rows the caller holds, and the SHA-256 is
            # unique in the database, whose IntegrityError is handled just below: asking
            # again would cost three queries per file for nothing.
            save_record(
                record, actor, trusted=("uploaded_by", "instrument"), validate_unique=False
            )
    except IntegrityError:
        # The same bytes arrived twice at once; the other request recorded them.
        return Ingested(AcquiredFile.objects.get(sha256=stored.sha256), created=False)
    if record.status == AcquiredFile.Status.PENDING:
        transaction.on_commit(lambda: queue_processing(record.pk, stamp=False))
    return Ingested(record, created=True)


def queue_processing(file_id: int, *, stamp: bool = True) -> bool:
    """Wake a worker for a pending file. A broker outage is logged; the sweep queues it later.
    ``stamp``: record the time it was queued (a new file has it from its INSERT)."""
    from labbook.datafiles.tasks import process_file

    if stamp:
        AcquiredFile.objects.filter(pk=file_id).update(queued_at=timezone.now())
    try:
        process_file.delay(file_id)
    except Exception:  # noqa: BLE001 - the row stays pending and the sweep retries it
        log.warning(
            "could not queue file %s; the sweep will queue it again", file_id, exc_info=True
        )
        return False
    return True


def store_lineage(record: AcquiredFile, found: lineage.Lineage) -> None:
    """Write a resolved lineage onto the record (fields + coverage rows); caller saves."""
    record.instrument = found.instrument
    record.operator = found.operator
    record.sample = found.sample
    record.preparation = found.preparation
    record.tip = found.tip
    record.coverage_ml = found.coverage_ml
    record.lineage = found.snapshot
    record.lineage_resolved_at = timezone.now()


def replace_coverages(
    record: AcquiredFile, coverages: list[dict[str, Any]], *, first: bool = False
) -> None:
    """Replace the coverage rows of a dataset. ``first``: its lineage was never resolved
    before (``lineage_resolved_at`` was empty), so it has no rows to delete."""
    if not first:
        FileCoverage.objects.filter(file=record).delete()
    if not coverages:
        return
    FileCoverage.objects.bulk_create(
        FileCoverage(
            file=record,
            material=c["material"],
            coverage_ml=c["coverage_ml"],
            uncertainty_ml=c.get("uncertainty_ml"),
        )
        for c in coverages
    )


CORRECTABLE = (
    "instrument",
    "sample",
    "tip",
    "operator",
    "acquired_at",
    "bias_v",
    "setpoint_a",
    "kind",
)


@transaction.atomic
def correct_file(record: AcquiredFile, *, changes: dict[str, Any], actor) -> AcquiredFile:
    """Correct what was logged about a dataset (the wrong tip, a missing sample) and resolve
    its lineage again. The bytes never change; the history keeps the old and the new."""
    require_member(actor)
    unknown = set(changes) - set(CORRECTABLE)
    if unknown:
        raise ValidationError({name: "cannot be corrected here" for name in sorted(unknown)})
    record = AcquiredFile.objects.select_for_update().get(pk=record.pk)
    given = dict(record.given_metadata)
    for name, value in changes.items():
        given[name] = value.isoformat() if hasattr(value, "isoformat") else value
    record.given_metadata = given
    for name in ("acquired_at", "bias_v", "setpoint_a", "kind"):
        if name in changes:
            setattr(record, name, changes[name])
    found = lineage.resolve(
        acquired_at=record.acquired_at,
        metadata=given,
        instrument=record.instrument,
        uploaded_by=record.uploaded_by,
    )
    store_lineage(record, found)
    save_record(record, actor)
    replace_coverages(record, found.coverages)
    return record
