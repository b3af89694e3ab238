"""RO-Crates built in the background: a figure's datasets chosen on the search page become a
durable job (``core.Job``) whose worker writes the ZIP into the file storage, reporting how many
datasets it has written as it goes; the crate page follows the job and offers the download.

The stored ZIP is named by the job, never by what someone typed:
``exports/crates/<job id>-<hash>.zip``.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from typing import Any

from django.core.files import File
from django.core.files.storage import default_storage
from django.db import transaction

from labbook.core.jobs import enqueue, job_handler
from labbook.core.models import Job
from labbook.datafiles.models import AcquiredFile
from labbook.provenance import crate
from labbook.provenance.queries import provenance_of

#: The job kind of a crate export; params are {"ids": dataset ids in the order chosen,
#: "name": the crate's title, "description": its description, "actor": user id or None}.
CRATE_JOB = "provenance.crate"
STORAGE_FOLDER = "exports/crates"
NAME_MAX = 300
DESCRIPTION_MAX = 5000


class CrateRequestError(ValueError):
    """What is wrong with a crate request, in words for the person who made it."""

    def __init__(self, problems: list[str]):
        super().__init__("; ".join(problems))
        self.problems = problems


def check_ids(ids: list[Any]) -> list[int]:
    """The distinct dataset ids, in the order given, or every problem with them named."""
    problems: list[str] = []
    unique: list[int] = []
    for value in ids:
        text = str(value).strip()
        if not text.isdigit():
            problems.append(f"“{text[:40]}” is not a dataset id (ids are whole numbers)")
        elif int(text) not in unique:
            unique.append(int(text))
    if not unique and not problems:
        problems.append("no dataset was selected: tick “Add to crate” on at least one dataset")
    if len(unique) > crate.MAX_DATASETS:
        problems.append(
            f"{len(unique)} datasets were selected, and a crate holds at most "
            f"{crate.MAX_DATASETS}: make several crates"
        )
    elif unique:
        found = set(AcquiredFile.objects.filter(pk__in=unique).values_list("pk", flat=True))
        missing = [i for i in unique if i not in found]
        if missing:
            shown = ", ".join(str(i) for i in missing[:20])
            more = f" and {len(missing) - 20} more" if len(missing) > 20 else ""
            problems.append(
                f"no dataset {shown}{more}: "
                + ("it is" if len(missing) == 1 else "they are")
                + " not in this labbook"
            )
    if problems:
        raise CrateRequestError(problems)
    return unique


def request_crate(ids: list[Any], *, name: str = "", description: str = "", actor=None) -> Job:
    """Check the request and record the crate as a pending job, queued once this commits."""
    problems: list[str] = []
    try:
        unique = check_ids(ids)
    except CrateRequestError as exc:
        problems.extend(exc.problems)
        unique = []
    name, description = (name or "").strip(), (description or "").strip()
    if len(name) > NAME_MAX:
        problems.append(f"the title has {len(name)} characters; at most {NAME_MAX} fit")
    if len(description) > DESCRIPTION_MAX:
        problems.append(
            f"the description has {len(description)} characters; at most {DESCRIPTION_MAX} fit"
        )
    # PostgreSQL's jsonb cannot hold U+0000; refused here, it is named instead of a 500.
    for field, text in (("title", name), ("description", description)):
        if "\x00" in text:
            problems.append(
                f"the {field} has a NUL character (U+0000), which cannot be stored: remove it"
            )
    if problems:
        raise CrateRequestError(problems)
    with transaction.atomic():
        return enqueue(
            CRATE_JOB,
            {
                "ids": unique,
                "name": name,
                "description": description,
                "actor": getattr(actor, "pk", None),
            },
            actor=actor,
        )


def storage_name_for(job: Job, ids: list[int]) -> str:
    """Chosen by labbook alone. The same job always gets the same name, so a run repeated
    after a worker died replaces its own half-written ZIP rather than leaving a second one."""
    digest = hashlib.sha256(json.dumps([job.pk, ids], separators=(",", ":")).encode())
    return f"{STORAGE_FOLDER}/{job.pk}-{digest.hexdigest()[:16]}.zip"


@job_handler(CRATE_JOB)
def build_crate_job(job: Job) -> dict:
    """Write the crate of the job's datasets into the file storage.

    Progress goes on the row ({"datasets": N, "done": k}) as each dataset is written; the
    outcome replaces it. Running it again writes the same ZIP under the same name.
    """
    params = job.params or {}
    try:
        ids = [int(i) for i in params.get("ids", [])]
    except (TypeError, ValueError) as exc:
        raise ValueError(f"job {job.pk}: ids must be a list of dataset ids") from exc
    ids = check_ids(ids)  # a dataset gone since the request is named, not skipped
    found = [provenance_of(i, neighbours=False) for i in ids]
    total = len(found)

    def progress(done: int, of: int) -> None:
        Job.objects.filter(pk=job.pk).update(result={"datasets": of, "done": done})

    progress(0, total)
    labels = {
        "name": str(params.get("name") or "")[:NAME_MAX],
        "description": str(params.get("description") or "")[:DESCRIPTION_MAX],
    }
    storage_name = storage_name_for(job, ids)
    scratch = crate.scratch_dir()
    digest = hashlib.sha256()
    size = 0
    try:
        written = scratch / "crate.zip"
        with open(written, "wb") as out:
            for chunk in crate.stream_crate(found, progress=progress, **labels):
                out.write(chunk)
                digest.update(chunk)
                size += len(chunk)
        if default_storage.exists(storage_name):
            default_storage.delete(storage_name)
        with open(written, "rb") as handle:
            saved = default_storage.save(storage_name, File(handle, name=storage_name))
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return {
        "datasets": total,
        "done": total,
        "storage_name": saved,
        "size_bytes": size,
        "sha256": digest.hexdigest(),
        "filename": crate.crate_filename(found, title=labels["name"]),
    }
