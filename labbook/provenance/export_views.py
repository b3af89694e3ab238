"""The pages of crate exports: datasets ticked on the search page become a crate job; the crate
page follows its progress (an htmx part, polled as the upload's is) and offers the ZIP.

Views validate, call ``export_jobs.request_crate`` and render; the worker builds the crate.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from django.core.files.storage import default_storage
from django.http import FileResponse, Http404, HttpRequest, HttpResponse, HttpResponseRedirect
from django.shortcuts import render
from django.urls import reverse
from django.utils.http import url_has_allowed_host_and_scheme
from django.views.decorators.http import require_GET, require_http_methods

from labbook.accounts.permissions import lab_member_required
from labbook.core.models import Job
from labbook.datafiles.models import AcquiredFile
from labbook.provenance import crate
from labbook.provenance.export_jobs import (
    CRATE_JOB,
    DESCRIPTION_MAX,
    NAME_MAX,
    CrateRequestError,
    request_crate,
)
from labbook.web.polling import poll_every, polls_so_far

_ID_SEPARATORS = re.compile(r"[\s,;]+")


def _see_other(url: str) -> HttpResponse:
    """303: after a POST the browser GETs the crate's page (a reload never posts twice)."""
    response = HttpResponseRedirect(url)
    response.status_code = 303
    return response


def _crate_job(job_id: int) -> Job:
    """A crate job, or 404: other kinds of job are not crates and are not shown here."""
    job = Job.objects.filter(pk=job_id, kind=CRATE_JOB).select_related("created_by").first()
    if job is None:
        raise Http404(f"no crate {job_id}")
    return job


def _back_to(request: HttpRequest, value: Any) -> str:
    """Where "back to the search" goes: the search the datasets were ticked on, if local."""
    text = str(value or "")
    if text and url_has_allowed_host_and_scheme(
        text, allowed_hosts={request.get_host()}, require_https=request.is_secure()
    ):
        return text
    return reverse("datafiles:search")


@dataclass
class CrateStatus:
    """What the crate page and its part show of a job."""

    job: Job
    total: int
    done: int

    @property
    def state(self) -> str:
        return self.job.state

    @property
    def finished(self) -> bool:
        return self.job.state in (Job.State.DONE, Job.State.FAILED)

    @property
    def ready(self) -> bool:
        return self.job.state == Job.State.DONE and bool(
            (self.job.result or {}).get("storage_name")
        )

    @property
    def size_bytes(self) -> int:
        return int((self.job.result or {}).get("size_bytes") or 0)

    @property
    def filename(self) -> str:
        return str((self.job.result or {}).get("filename") or "crate.zip")


def crate_status(job: Job) -> CrateStatus:
    ids = (job.params or {}).get("ids") or []
    result = job.result or {}
    total = int(result.get("datasets") or len(ids))
    done = int(result.get("done") or 0)
    if job.state == Job.State.DONE:
        done = total
    return CrateStatus(job=job, total=total, done=min(done, total))


def crate_title(job: Job) -> str:
    params = job.params or {}
    n = len(params.get("ids") or [])
    return str(params.get("name") or "") or f"Crate of {n} dataset{'s' if n != 1 else ''}"


@lab_member_required
@require_http_methods(["GET", "POST"])
def crate_new(request: HttpRequest) -> HttpResponse:
    """POST: check the ticked datasets, record the crate job and go to its page (303).
    GET (or a refused POST): the chosen datasets with the title and description to fill, and
    every problem named; nothing typed or ticked is dropped."""
    source = request.POST if request.method == "POST" else request.GET
    more = str(source.get("more_ids", ""))
    # Ticked boxes send one id each; a link may send several at once (?ids=12,15); ids typed
    # on the crate page ("12, 15 17") are for datasets not on the search page at hand.
    ids = [i for value in [*source.getlist("ids"), more] for i in _ID_SEPARATORS.split(str(value))]
    ids = [i for i in ids if i]
    name = str(source.get("name", ""))
    description = str(source.get("description", ""))
    back = _back_to(request, source.get("next"))
    problems: list[str] = []
    if request.method == "POST":
        try:
            job = request_crate(ids, name=name, description=description, actor=request.user)
        except CrateRequestError as exc:
            problems = exc.problems
        else:
            return _see_other(reverse("provenance:crate", args=[job.pk]))
    numeric = [int(i) for i in ids if str(i).strip().isdigit()][: crate.MAX_DATASETS]
    chosen = {f.pk: f for f in AcquiredFile.objects.filter(pk__in=numeric)}
    response = render(
        request,
        "provenance/crate_new.html",
        {
            "problems": problems,
            "chosen": [chosen[i] for i in dict.fromkeys(numeric) if i in chosen],
            "name": name,
            "description": description,
            "more_ids": more if problems else "",
            "back": back,
            "max_datasets": crate.MAX_DATASETS,
            "name_max": NAME_MAX,
            "description_max": DESCRIPTION_MAX,
        },
    )
    if problems:
        response.status_code = 422
    return response


def _page_context(job: Job, polls: int = 0) -> dict[str, Any]:
    return {
        "job": job,
        "status": crate_status(job),
        "title": crate_title(job),
        "polls": polls,
        "poll_every": poll_every(polls),
    }


@lab_member_required
@require_GET
def crate_page(request: HttpRequest, job_id: int) -> HttpResponse:
    """One crate: its title, its datasets, how far the worker is, then the download."""
    job = _crate_job(job_id)
    params = job.params or {}
    ids = [int(i) for i in params.get("ids") or []]
    by_id = {f.pk: f for f in AcquiredFile.objects.filter(pk__in=ids).select_related("sample")}
    context = _page_context(job)
    context.update(
        {
            "description": str(params.get("description") or ""),
            "datasets": [by_id[i] for i in ids if i in by_id],
            "gone": [i for i in ids if i not in by_id],
        }
    )
    return render(request, "provenance/crate.html", context)


@lab_member_required
@require_GET
def crate_progress(request: HttpRequest, job_id: int) -> HttpResponse:
    """htmx: the crate's progress; the answer for a finished job has no trigger, so the
    polling stops."""
    job = _crate_job(job_id)
    context = _page_context(job, polls_so_far(request) + 1)
    context["announce"] = True
    return render(request, "provenance/_crate_progress.html", context)


@lab_member_required
@require_GET
def crate_download(request: HttpRequest, job_id: int) -> HttpResponse:
    """The stored ZIP of a finished crate; before it is ready, the crate's page."""
    job = _crate_job(job_id)
    status = crate_status(job)
    if not status.ready:
        return _see_other(reverse("provenance:crate", args=[job.pk]))
    storage_name = str(job.result["storage_name"])
    if not default_storage.exists(storage_name):
        raise Http404(f"the ZIP of crate {job.pk} is no longer stored: make the crate again")
    return FileResponse(
        default_storage.open(storage_name, "rb"),
        as_attachment=True,
        filename=status.filename,
        content_type="application/zip",
    )
