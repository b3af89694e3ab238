"""Pages of the audit: the lab's change log (filterable, shareable GET URLs, keyset pages), a
tip's datasets by tip state, and the tips behind a set of datasets."""

from __future__ import annotations

from datetime import datetime, time, timedelta
from urllib.parse import urlencode
from zoneinfo import ZoneInfo

from django.conf import settings
from django.contrib.auth import get_user_model
from django.http import HttpRequest, HttpResponse
from django.shortcuts import get_object_or_404, render
from django.views.decorators.http import require_GET

from labbook.accounts.permissions import lab_member_required
from labbook.datafiles.models import AcquiredFile
from labbook.provenance import audit
from labbook.tips.models import Tip

#: Most dataset ids one tips-of-datasets page takes.
MAX_IDS = 500


def _lab_time(text: str, *, field: str, end_of_day: bool = False) -> datetime:
    """A date (YYYY-MM-DD) or a date and time typed in the lab's zone, as an aware time."""
    zone = ZoneInfo(settings.TIME_ZONE)
    text = text.strip()
    try:
        if len(text) == 10:
            day = datetime.strptime(text, "%Y-%m-%d").date()  # noqa: DTZ007 - zone added below
            value = datetime.combine(day, time.min, tzinfo=zone)
            return value + timedelta(days=1) if end_of_day else value
        value = datetime.fromisoformat(text)
    except ValueError as exc:
        raise ValueError(f"{field}: give a date (2026-03-02) or a date and time") from exc
    return value if value.tzinfo else value.replace(tzinfo=zone)


def _filter(request: HttpRequest) -> tuple[audit.ChangeFilter, list[str]]:
    errors: list[str] = []
    params = request.GET
    user = None
    if params.get("user"):
        if params["user"].isdigit():
            user = int(params["user"])
        else:
            errors.append("user: choose someone from the list")
    types = tuple(t for t in params.getlist("type") if t)
    unknown = [t for t in types if t not in audit.TYPES_BY_KEY]
    if unknown:
        errors.append("type: no such record type: " + ", ".join(unknown))
        types = tuple(t for t in types if t in audit.TYPES_BY_KEY)
    since = until = None
    try:
        if params.get("since"):
            since = _lab_time(params["since"], field="since")
        if params.get("until"):
            until = _lab_time(params["until"], field="until", end_of_day=True)
    except ValueError as exc:
        errors.append(str(exc))
    record = None
    if params.get("record"):
        if not params["record"].isdigit() or len(types) != 1:
            errors.append("record: give a record number with exactly one record type")
        else:
            record = int(params["record"])
    return audit.ChangeFilter(user, types, since, until, record), errors


@lab_member_required
@require_GET
def change_log(request: HttpRequest) -> HttpResponse:
    wanted, errors = _filter(request)
    after = None
    if request.GET.get("after"):
        try:
            after = audit.Cursor.decode(request.GET["after"])
        except ValueError as exc:
            errors.append(str(exc))
    page = audit.change_page(wanted, after=after)
    kept = [
        (key, value)
        for key, values in request.GET.lists()
        for value in values
        if key != "after" and value
    ]
    next_url = None
    if page.next_cursor is not None:
        next_url = "?" + urlencode([*kept, ("after", page.next_cursor.encode())])
    first_url = "?" + urlencode(kept) if after is not None else None
    people = get_user_model().objects.filter(is_active=True).order_by("username")
    return render(
        request,
        "provenance/audit/change_log.html",
        {
            "page": page,
            "errors": errors,
            "types": audit.RECORD_TYPES,
            "chosen_types": set(wanted.types),
            "people": people,
            "chosen_user": wanted.user,
            "params": request.GET,
            "next_url": next_url,
            "first_url": first_url,
        },
        status=400 if errors else 200,
    )


@lab_member_required
@require_GET
def tip_audit(request: HttpRequest, pk: int) -> HttpResponse:
    tip = get_object_or_404(Tip.objects.all(), pk=pk)  # retired tips are audited too
    return render(request, "provenance/audit/tip_audit.html", {"audit": audit.tip_audit(tip)})


@lab_member_required
@require_GET
def tips_of_datasets(request: HttpRequest) -> HttpResponse:
    """The tips behind a set of datasets: ``?files=1,2,3`` or a dataset search's own
    parameters (``?tip=…&since=…``, as on the datasets page)."""
    errors: list[str] = []
    text = request.GET.get("files", "").strip()
    chosen = None
    if text:
        parts = [p.strip() for p in text.replace(" ", ",").split(",") if p.strip()]
        bad = [p for p in parts if not p.isdigit()]
        if bad:
            errors.append(
                "files: dataset numbers separated by commas, e.g. 12,13,20; not "
                + ", ".join(bad[:5])
            )
        ids = [int(p) for p in parts if p.isdigit()]
        if len(ids) > MAX_IDS:
            errors.append(f"files: at most {MAX_IDS} datasets at once")
            ids = ids[:MAX_IDS]
        chosen = AcquiredFile.objects.filter(pk__in=ids)
    elif any(k in request.GET for k in ("tip", "sample", "instrument", "since", "until", "q")):
        from labbook.datafiles.queries import FileSearch, search

        try:
            criteria = FileSearch(
                tip=_int(request.GET.get("tip")),
                sample=_int(request.GET.get("sample")),
                instrument=_int(request.GET.get("instrument")),
                since=_lab_time(request.GET["since"], field="since")
                if request.GET.get("since")
                else None,
                until=_lab_time(request.GET["until"], field="until", end_of_day=True)
                if request.GET.get("until")
                else None,
                q=request.GET.get("q") or None,
            )
        except ValueError as exc:
            errors.append(str(exc))
        else:
            chosen = search(criteria)
    uses, untipped = ([], []) if chosen is None else audit.tips_of_files(chosen)
    return render(
        request,
        "provenance/audit/tips_of_files.html",
        {
            "uses": uses,
            "untipped": untipped,
            "errors": errors,
            "files_text": text,
            "asked": chosen is not None,
            "count": sum(len(u.files) for u in uses) + len(untipped),
        },
        status=400 if errors else 200,
    )


def _int(value: str | None) -> int | None:
    if value in (None, ""):
        return None
    if not value.isdigit():
        raise ValueError(f"{value!r}: give a record number")
    return int(value)
