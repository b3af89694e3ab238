"""The pages of acquired files: the search with its thumbnail grid, the upload with rows that
follow their processing, and one dataset with its facts, numbers, lineage and history.

Views validate, call one query or action and render. The presenters at the bottom put the
stored SI values and the stored lineage snapshot into the units and words a lab reads; nothing
here recomputes a statistic or a lineage.
"""

from __future__ import annotations

import math
import re
import secrets
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from django.conf import settings
from django.contrib import messages
from django.core.exceptions import ValidationError
from django.db.models import F, QuerySet
from django.http import HttpRequest, HttpResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.utils.http import urlencode
from django.views.decorators.http import require_GET, require_http_methods, require_POST

from labbook.accounts.permissions import lab_member_required
from labbook.datafiles import actions, queries
from labbook.datafiles.forms import SORTS, CorrectionForm, SearchForm, UploadForm
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.spectrum_views import plot_url
from labbook.datafiles.storage import UploadTooLarge, safe_display_name
from labbook.instruments import queries as instrument_queries
from labbook.provenance import views as provenance_views
from labbook.samples.forms import lab_zone
from labbook.samples.views import duration_text, with_uncertainty
from labbook.tips.models import Conditioning
from labbook.tips.views import param_label, param_text
from labbook.web.polling import poll_every, polls_so_far
from labbook.web.templatetags.labbook_format import (
    NBSP,
    format_age,
    format_quantity,
    formula,
    scientific,
)

PER_PAGE = 24
# Pages deeper than this are a bookmark gone stale or a crawler: the offset would cost a scan.
MAX_PAGE = 2000

# --- search -----------------------------------------------------------------------------------


def _page_number(value: Any) -> int:
    text = str(value or "").strip()
    return min(int(text), MAX_PAGE) if text.isdigit() and int(text) > 0 else 1


def _ordered(found: QuerySet[AcquiredFile], sort: str) -> QuerySet[AcquiredFile]:
    """The grid's order. Newest first is the search's own order (and its index)."""
    if sort == "oldest":
        return found.order_by(F("acquired_at").asc(nulls_last=True), "id")
    if sort == "bias":
        return found.order_by(F("bias_v").asc(nulls_last=True), "-acquired_at", "-id")
    if sort == "-bias":
        return found.order_by(F("bias_v").desc(nulls_last=True), "-acquired_at", "-id")
    return found


def _page_url(request: HttpRequest, page: int) -> str:
    params = request.GET.copy()
    params.pop("page", None)
    if page > 1:
        params["page"] = str(page)
    query = params.urlencode()
    return f"{request.path}?{query}" if query else request.path


@lab_member_required
@require_GET
def integrity(request: HttpRequest) -> HttpResponse:
    """The latest re-hash of the stored files (``verify_files`` or the weekly task)."""
    from labbook.datafiles.integrity import latest_report

    return render(request, "datafiles/integrity.html", {"report": latest_report()})


@lab_member_required
@require_GET
def search(request: HttpRequest) -> HttpResponse:
    """Datasets by the conditions they were taken under. A GET form: the URL is the search,
    to bookmark or to send to a colleague. Pages by limit + 1, never by a count."""
    form = SearchForm(request.GET or None, user=request.user)
    page = _page_number(request.GET.get("page"))
    tiles: list[Tile] = []
    more = False
    valid = not form.is_bound or form.is_valid()
    sort = form.order if form.is_bound and valid else "newest"
    if valid:
        criteria = queries.FileSearch(**form.criteria()) if form.is_bound else queries.FileSearch()
        offset = (page - 1) * PER_PAGE
        if sort == "newest":
            found = queries.newest_page(criteria, offset=offset, limit=PER_PAGE + 1)
        else:
            found = _ordered(queries.search(criteria), sort)[offset : offset + PER_PAGE + 1]
        # A tile shows none of the JSON columns but the metadata as sent (a pending file's
        # kind): the statistics with their histogram, the lineage and the header stay unread.
        found = (
            found.select_related("sample", "instrument")
            .prefetch_related("coverages")
            .defer("stats", "lineage", "raw_header", "metadata")
        )
        chunk = list(found)
        more = len(chunk) > PER_PAGE
        tiles = [tile(record) for record in chunk[:PER_PAGE]]
    first = (page - 1) * PER_PAGE + 1
    return render(
        request,
        "datafiles/search.html",
        {
            "form": form,
            "tiles": tiles,
            "page": page,
            "first": first,
            "last": first + len(tiles) - 1,
            "next_url": _page_url(request, page + 1) if more else "",
            "previous_url": _page_url(request, page - 1) if page > 1 else "",
            "sort_label": SORTS[sort],
            "active_filters": form.active_filters(),
            "narrowed": bool(form.is_bound and valid and form.active_filters()),
            "focus": next((name for name in form.fields if name in form.errors), ""),
        },
    )


# --- upload -----------------------------------------------------------------------------------

_BATCHES = "datafiles.batches"  # session key: the last few uploads' outcomes, by token
_KEEP_BATCHES = 5


def _ingest_one(upload, metadata: dict[str, Any], instrument, actor) -> dict[str, Any]:
    """One file of a batch: new, already stored, or refused with the reason. A refusal is
    answered here so that it never stops the files after it."""
    name = safe_display_name(upload.name or "upload")
    try:
        result = actions.ingest(
            upload, upload.name or "upload", metadata=metadata, actor=actor, instrument=instrument
        )
    except UploadTooLarge as exc:
        return {"name": name, "outcome": "refused", "reason": str(exc)}
    except ValidationError as exc:
        return {"name": name, "outcome": "refused", "reason": " ".join(exc.messages)}
    except OSError as exc:  # the disk, not the file: say so, keep going with the others
        reason = f"could not be stored ({exc.strerror or exc}); try it again"
        return {"name": name, "outcome": "refused", "reason": reason}
    return {
        "name": name,
        "outcome": "new" if result.created else "stored",
        "id": result.file.pk,
    }


def _remember_batch(request: HttpRequest, outcomes: list[dict[str, Any]]) -> str:
    batches = dict(request.session.get(_BATCHES) or {})
    token = secrets.token_urlsafe(6)
    batches[token] = {"at": timezone.now().isoformat(), "outcomes": outcomes}
    newest = sorted(batches.items(), key=lambda item: item[1].get("at", ""))[-_KEEP_BATCHES:]
    request.session[_BATCHES] = dict(newest)
    return token


def _batch(request: HttpRequest, token: str | None) -> list[dict[str, Any]] | None:
    if not token:
        return None
    found = (request.session.get(_BATCHES) or {}).get(str(token))
    return None if found is None else list(found.get("outcomes") or [])


@dataclass
class UploadRow:
    """One file of an upload as its row shows it; ``record`` is None for a refused file."""

    name: str
    outcome: str
    reason: str = ""
    record: AcquiredFile | None = None
    tile: Tile | None = None

    @property
    def outcome_label(self) -> str:
        return {"new": "new", "stored": "already stored", "refused": "refused"}.get(
            self.outcome, ""
        )


def _rows(outcomes: list[dict[str, Any]]) -> list[UploadRow]:
    ids = [o["id"] for o in outcomes if o.get("id")]
    records = {
        r.pk: r
        for r in queries.files()
        .filter(pk__in=ids)
        .select_related("sample", "instrument")
        .prefetch_related("coverages")
    }
    rows = []
    for o in outcomes:
        record = records.get(o.get("id"))
        rows.append(
            UploadRow(
                name=o.get("name", ""),
                outcome=o.get("outcome", ""),
                reason=o.get("reason", ""),
                record=record,
                tile=None if record is None else tile(record),
            )
        )
    return rows


@dataclass
class Progress:
    total: int
    processed: int
    ready: int
    unreadable: int
    refused: int

    @property
    def done(self) -> bool:
        return self.processed >= self.total


def _progress(outcomes: list[dict[str, Any]]) -> Progress:
    ids = [o["id"] for o in outcomes if o.get("id")]
    statuses = list(AcquiredFile.objects.filter(pk__in=ids).values_list("status", flat=True))
    return Progress(
        total=len(statuses),
        processed=sum(s != AcquiredFile.Status.PENDING for s in statuses),
        ready=sum(s == AcquiredFile.Status.READY for s in statuses),
        unreadable=sum(s == AcquiredFile.Status.UNREADABLE for s in statuses),
        refused=sum(o.get("outcome") == "refused" for o in outcomes),
    )


@lab_member_required
@require_http_methods(["GET", "POST"])
def upload(request: HttpRequest) -> HttpResponse:
    """Upload files with what is known about them. Each file is ingested on its own (one bad
    file never blocks the others); the outcomes are kept in the session and shown after a
    redirect, so reloading the page never uploads the files again."""
    if request.method == "POST":
        form = UploadForm(request.POST, user=request.user)
        files = request.FILES.getlist("files")
        files_error = "" if files else "choose one or more files"
        if form.is_valid() and files:
            metadata = form.metadata()
            instrument = form.cleaned_data.get("instrument")
            outcomes = [_ingest_one(f, metadata, instrument, request.user) for f in files]
            token = _remember_batch(request, outcomes)
            return redirect(f"{reverse('datafiles:upload')}?{urlencode({'batch': token})}")
    else:
        form = UploadForm(user=request.user)
        files_error = ""
    token = request.GET.get("batch", "")
    outcomes = _batch(request, token)
    focus = "id_files" if files_error else next((n for n in form.fields if n in form.errors), "")
    return render(
        request,
        "datafiles/upload.html",
        {
            "form": form,
            "files_error": files_error,
            "batch": token if outcomes is not None else "",
            "batch_missing": bool(token) and outcomes is None,
            "rows": _rows(outcomes or []),
            "progress": _progress(outcomes or []),
            "focus": focus,
            "max_upload": size_text(settings.LABBOOK_MAX_UPLOAD_BYTES),
            "max_files": settings.DATA_UPLOAD_MAX_NUMBER_FILES,
        },
    )


@lab_member_required
@require_GET
def row_part(request: HttpRequest, pk: int) -> HttpResponse:
    """htmx: one upload row. While the file is pending, the row asks again (``hx-trigger``);
    the answer for a ready or unreadable file has no trigger, so the polling stops."""
    record = get_object_or_404(
        queries.files().select_related("sample", "instrument").prefetch_related("coverages"),
        pk=pk,
    )
    token = str(request.GET.get("batch", ""))
    outcome = next(
        (o for o in (_batch(request, token) or []) if o.get("id") == record.pk),
        {"name": record.original_name, "outcome": ""},
    )
    row = UploadRow(
        name=outcome.get("name") or record.original_name,
        outcome=outcome.get("outcome", ""),
        record=record,
        tile=tile(record),
    )
    polls = polls_so_far(request) + 1
    return render(
        request,
        "datafiles/_upload_row.html",
        {"row": row, "batch": token, "polls": polls, "poll_every": poll_every(polls)},
    )


@lab_member_required
@require_GET
def progress_part(request: HttpRequest) -> HttpResponse:
    """htmx: "n of m processed" for a batch; it stops asking once every file is processed."""
    token = str(request.GET.get("batch", ""))
    outcomes = _batch(request, token) or []
    polls = polls_so_far(request) + 1
    return render(
        request,
        "datafiles/_progress.html",
        {
            "progress": _progress(outcomes),
            "batch": token,
            "polls": polls,
            "poll_every": poll_every(polls),
            "announce": True,
        },
    )


# --- one dataset ------------------------------------------------------------------------------


def _dataset(pk: int) -> AcquiredFile:
    return get_object_or_404(
        queries.files()
        .select_related("instrument", "sample", "tip", "operator", "preparation", "uploaded_by")
        .select_related("preparation__recipe")
        .prefetch_related("coverages"),
        pk=pk,
    )


@lab_member_required
@require_GET
def dataset(request: HttpRequest, pk: int) -> HttpResponse:
    record = _dataset(pk)
    form = CorrectionForm(record=record, user=request.user)
    return render(request, "datafiles/dataset.html", dataset_context(record, form))


@lab_member_required
@require_POST
def correct(request: HttpRequest, pk: int) -> HttpResponse:
    """Correct what was logged about a dataset; ``correct_file`` resolves the lineage again
    and the history keeps the old and the new."""
    record = _dataset(pk)
    form = CorrectionForm(request.POST, record=record, user=request.user)
    if form.is_valid():
        changes = form.changes()
        if not changes:
            messages.info(request, "Nothing was changed: the form matched the record.")
            return redirect("datafiles:dataset", pk=record.pk)
        before = _lineage_names(record)
        try:
            corrected = actions.correct_file(record, changes=changes, actor=request.user)
        except ValidationError as exc:
            _form_errors(form, exc)
        else:
            messages.success(request, correction_message(before, _dataset(corrected.pk)))
            # The top of the page: the message says what changed, the lineage is below it.
            return redirect("datafiles:dataset", pk=record.pk)
    return render(request, "datafiles/dataset.html", dataset_context(record, form))


def _form_errors(form: CorrectionForm, error: ValidationError) -> None:
    if not hasattr(error, "error_dict"):
        form.add_error(None, error)
        return
    for name, problems in error.error_dict.items():
        target = name if name in form.fields else None
        for problem in problems:
            form.add_error(target, " ".join(problem.messages))


def _lineage_names(record: AcquiredFile) -> dict[str, str]:
    return {
        "instrument": str(record.instrument or "none"),
        "sample": str(record.sample or "none"),
        "tip": str(record.tip or "none"),
        "acquired at": lab_time(record.acquired_at),
    }


def correction_message(before: dict[str, str], record: AcquiredFile) -> str:
    after = _lineage_names(record)
    changed = [
        f"{name} {before[name]} → {after[name]}" for name in after if before[name] != after[name]
    ]
    if not changed:
        return "Corrected; the lineage resolved again to the same records."
    return "Corrected and the lineage resolved again: " + "; ".join(changed) + "."


def dataset_context(record: AcquiredFile, form: CorrectionForm) -> dict[str, Any]:
    given = record.given_metadata or {}
    return {
        "record": record,
        "facts": facts(record),
        "metadata_groups": metadata_groups(record),
        "stat_groups": stat_groups(record),
        "lineage": lineage_view(record),
        "form": form,
        "kind_text": kind_text(record),
        "sample_given": given.get("sample") not in (None, ""),
        "tip_given": given.get("tip") not in (None, ""),
        "page_instrument": record.instrument,
        "note_tip": record.tip,
        "provenance": provenance_views.panel_context(record),
        "spectrum_url": plot_url(record),
    }


# --- presenters -------------------------------------------------------------------------------

_TRAILING_ZEROS = re.compile(r"^(-?\d+)\.(\d*?)0+(?=\D|$)")


def _plain(text: str) -> str:
    """'0.500 V' -> '0.5 V': a metadata value reads as it was set, not to three figures."""
    return _TRAILING_ZEROS.sub(
        lambda m: m.group(1) + (f".{m.group(2)}" if m.group(2) else ""), text
    )


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value) if math.isfinite(value) else None


def _minus(text: str) -> str:
    """A typographic minus sign, so '−0.5 V' and '−100 pm' read alike on one page."""
    return "−" + text[1:] if text.startswith("-") else text


# Below an atto-unit a stored mean or minimum is rounding noise of a levelled image, and the
# prefix table (down to femto) would print it as a long row of zeros.
_NOISE = 1e-18


def in_unit(value: Any, unit: str, factor: float = 1.0) -> str:
    """A value in one fixed unit ('−0.5 V', '50 pA'): the unit the trade quotes it in."""
    x = _number(value)
    if x is None:
        return "—"
    # An angle's degree sign sits on the number (90°); other units keep their space.
    gap = "" if unit == "°" else NBSP
    return f"{_minus(_plain(format_quantity(x * factor, '')))}{gap}{unit}"


def prefixed(value: Any, unit: str) -> str:
    """A value with the SI prefix that suits it ('12.3 pm', '1.50 kHz')."""
    x = _number(value)
    if x is None:
        return "—"
    if abs(x) < _NOISE:
        return f"0{NBSP}{unit}"
    return _minus(format_quantity(x, unit))


def seconds_text(value: Any) -> str:
    x = _number(value)
    if x is None:
        return "—"
    if 0 < abs(x) < 1:
        return _plain(format_quantity(x * 1000, "ms"))
    return _plain(format_quantity(x, "s"))


def size_text(size: int) -> str:
    """'1.2 MB (1 234 567 bytes)' for the facts; decimal units, as disks are sold."""
    if size < 1000:
        return f"{size}{NBSP}bytes"
    for unit, scale in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if size >= scale:
            return f"{size / scale:.3g}{NBSP}{unit}"
    return f"{size}{NBSP}bytes"


def lab_time(value: datetime | None) -> str:
    if value is None:
        return "—"
    return timezone.localtime(value, lab_zone()).strftime("%Y-%m-%d %H:%M %Z")


def _when(value: Any) -> datetime | None:
    if isinstance(value, datetime):
        return value
    if isinstance(value, str) and value:
        try:
            parsed = datetime.fromisoformat(value)
        except ValueError:
            return None
        return parsed if parsed.tzinfo is not None else None
    return None


@dataclass
class Tile:
    """A dataset as the grid and the upload rows show it."""

    record: AcquiredFile
    bias: str = ""
    setpoint: str = ""
    coverage: str = ""
    reason: str = ""
    kind: str = ""
    # Nothing deposited since the last cleaning: only worth saying when a sample is known.
    clean: bool = False

    @property
    def thumbnail_url(self) -> str:
        if not self.record.thumbnail_name:
            return ""
        return f"/api/v1/files/{self.record.pk}/thumbnail.png"


def coverage_text(record: AcquiredFile) -> str:
    """'0.3 ML NaCl + 0.05 ML CO', or '' when nothing was deposited or nothing is known."""
    return " + ".join(
        f"{_plain(format_quantity(c.coverage_ml, 'ML'))} {formula(c.material)}"
        for c in record.coverages.all()
    )


def first_line(text: str, limit: int = 140) -> str:
    line = (text or "").strip().splitlines()[0] if (text or "").strip() else ""
    return line if len(line) <= limit else line[: limit - 1] + "…"


def tile(record: AcquiredFile) -> Tile:
    return Tile(
        record=record,
        bias=in_unit(record.bias_v, "V") if record.bias_v is not None else "",
        setpoint=in_unit(record.setpoint_a, "pA", 1e12) if record.setpoint_a is not None else "",
        coverage=coverage_text(record),
        clean=record.sample_id is not None and record.coverage_ml == 0,
        kind=kind_text(record).lower(),
        reason=first_line(record.error) if record.status == AcquiredFile.Status.UNREADABLE else "",
    )


@dataclass
class Line:
    label: str
    value: str
    note: str = ""
    mono: bool = False


@dataclass
class Group:
    title: str
    lines: list[Line] = field(default_factory=list)


_SOURCES = {
    "upload": "uploaded",
    "ingest": "ingested by command",
    "watch": "from a watched folder",
}


def kind_text(record: AcquiredFile) -> str:
    """The kind, once it is known: before a file is read it is only the column's default."""
    if record.status == AcquiredFile.Status.READY:
        return record.get_kind_display()
    given = (record.given_metadata or {}).get("kind")
    return str(dict(AcquiredFile.Kind.choices).get(given, "")) if given else ""


def facts(record: AcquiredFile) -> list[Line]:
    exact = f"{record.size_bytes:,} bytes".replace(",", "\u202f")
    came = _SOURCES.get(record.source, record.source)
    if record.uploaded_by:
        came += f" by {_person(record.uploaded_by)}"
    unreadable = record.status == AcquiredFile.Status.UNREADABLE
    lines = [
        Line("Name", record.original_name),
        Line("Size", size_text(record.size_bytes), exact if record.size_bytes >= 1000 else ""),
        Line("SHA-256", record.sha256, mono=True),
        Line("Reader", record.reader or "—", "refused it" if unreadable and record.reader else ""),
        Line("Kind", kind_text(record) or "not known"),
        Line("Came in", lab_time(record.created_at), came),
    ]
    if record.source_path:
        lines.append(Line("Picked up from", record.source_path, mono=True))
    if record.processed_at:
        lines.append(Line("Processed", lab_time(record.processed_at), f"attempt {record.attempts}"))
    return lines


def _person(user) -> str:
    if user is None:
        return "—"
    return user.get_full_name() or user.get_username()


def _pair(value: Any, unit: str, factor: float = 1.0) -> str:
    if (
        isinstance(value, list | tuple)
        and len(value) == 2
        and all(_number(v) is not None for v in value)
    ):
        a, b = (_plain(format_quantity(float(v) * factor, "")) for v in value)
        return f"{a} × {b}{NBSP}{unit}" if unit else f"{a} × {b}"
    return "—"


def _ordinal(value: Any) -> str:
    x = _number(value)
    if x is None:
        return "—"
    n = int(x)
    suffix = {1: "st", 2: "nd", 3: "rd"}.get(n if n < 20 else n % 10, "th")
    return f"{n}{suffix}"


def _with_kind(text: str, kind: Any) -> str:
    return f"{text} {kind}" if isinstance(kind, str) and kind and text != "—" else text


def _volts(value: Any) -> str:
    return in_unit(value, "V")


def _picoamps(value: Any) -> str:
    return in_unit(value, "pA", 1e12)


def _kelvin(value: Any) -> str:
    return in_unit(value, "K")


def _degrees(value: Any) -> str:
    return in_unit(value, "°")


def _nanometre_pair(value: Any) -> str:
    return _pair(value, "nm", 1e9)


def _count_pair(value: Any) -> str:
    return _pair(value, "")


def _metres(value: Any) -> str:
    return prefixed(value, "m")


def _modulation(value: Any) -> str:
    return prefixed(value, "V")


def _hertz(value: Any) -> str:
    return prefixed(value, "Hz")


def _newtons_per_metre(value: Any) -> str:
    return in_unit(value, "N/m")


def _plain_number(value: Any) -> str:
    return "—" if _number(value) is None else _plain(format_quantity(value, ""))


# What the normalised metadata holds, in the groups and units the dataset page shows it:
# (key, label, how a value reads, the key of its kind such as "rms"). Keys not listed are
# shown under "Other", as stored.
_METADATA: tuple[tuple[str, tuple[tuple[str, str, Any, str], ...]], ...] = (
    (
        "Scan",
        (
            ("bias_v", "Bias", _volts, ""),
            ("stabilisation_bias_v", "Stabilisation bias", _volts, ""),
            ("setpoint_a", "Setpoint", _picoamps, ""),
            ("scan_size_m", "Scan size", _nanometre_pair, ""),
            ("pixels", "Pixels", _count_pair, ""),
            ("angle_deg", "Scan angle", _degrees, ""),
            ("temperature_k", "Temperature", _kelvin, ""),
            ("mode", "Mode", str, ""),
            ("channel_name", "Channel", str, ""),
            ("line_time_s", "Line time", seconds_text, ""),
            ("z_offset_m", "Z offset", _metres, ""),
            ("bias_sign_convention", "Bias applied to", str, ""),
        ),
    ),
    (
        "Lock-in",
        (
            ("lockin_amplitude_v", "Modulation", _modulation, "lockin_amplitude_kind"),
            ("lockin_frequency_hz", "Frequency", _hertz, ""),
            ("lockin_time_constant_s", "Time constant", seconds_text, ""),
            ("lockin_phase_deg", "Phase", _degrees, ""),
            ("lockin_harmonic", "Harmonic", _ordinal, ""),
        ),
    ),
    (
        "Sweep",
        (
            ("sweep_start_v", "From", _volts, ""),
            ("sweep_end_v", "To", _volts, ""),
            ("sweep_points", "Points", str, ""),
            ("sweep_dwell_s", "Dwell per point", seconds_text, ""),
            ("sweep_repeats", "Repeats", str, ""),
            ("sweep_direction", "Direction", str, ""),
        ),
    ),
    (
        "Force sensor (nc-AFM)",
        (
            ("frequency_shift_hz", "Δf", _hertz, ""),
            ("oscillation_amplitude_m", "Amplitude", _metres, "oscillation_amplitude_kind"),
            ("sensor_resonance_hz", "Resonance f₀", _hertz, ""),
            ("sensor_stiffness_n_per_m", "Stiffness k", _newtons_per_metre, ""),
            ("sensor_quality_factor", "Quality factor Q", _plain_number, ""),
        ),
    ),
)
# Shown elsewhere on the page (lineage, facts) or only the other half of a pair shown above.
_NOT_METADATA = {
    "acquired_at",
    "acquired_at_assumed",
    "instrument",
    "sample",
    "tip",
    "operator",
    "kind",
    "lockin_amplitude_kind",
    "oscillation_amplitude_kind",
    "coverage_threshold_m",
}


def _other_value(key: str, value: Any) -> str:
    if key == "pressure_mbar":
        x = _number(value)
        return "—" if x is None else f"{scientific(x)}{NBSP}mbar"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int | float):
        return _plain(format_quantity(value, ""))
    if isinstance(value, list):
        return ", ".join(str(v) for v in value)
    return str(value)


def metadata_groups(record: AcquiredFile) -> list[Group]:
    meta = dict(record.metadata or {})
    if record.bias_v is not None:
        meta.setdefault("bias_v", record.bias_v)
    if record.setpoint_a is not None:
        meta.setdefault("setpoint_a", record.setpoint_a)
    if record.temperature_k is not None:
        meta.setdefault("temperature_k", record.temperature_k)
    groups: list[Group] = []
    listed: set[str] = set()
    for title, specs in _METADATA:
        group = Group(title)
        for key, label, show, kind_key in specs:
            listed.add(key)
            if meta.get(key) in (None, ""):
                continue
            group.lines.append(Line(label, _with_kind(show(meta[key]), meta.get(kind_key))))
        if group.lines:
            groups.append(group)
    other = Group("Other")
    for key in sorted(meta):
        if key in listed or key in _NOT_METADATA or meta[key] in (None, ""):
            continue
        label = "Pressure" if key == "pressure_mbar" else key.replace("_", " ").capitalize()
        other.lines.append(Line(label, _other_value(key, meta[key])))
    if other.lines:
        groups.append(other)
    return groups


def _data_unit(record: AcquiredFile) -> str:
    """The unit of an image's values: its channel's, as the reader found it (stored with the
    statistics); for datasets measured before that was kept, it follows from the kind (a
    topograph is heights in m, a current image is in A; otherwise it is not known)."""
    unit = (record.stats or {}).get("unit")
    if isinstance(unit, str) and unit:
        return unit
    return {"topograph": "m", "current": "A"}.get(record.kind, "")


def _span(low: str, high: str) -> str:
    return f"{low} to {high}"


def _image_groups(stats: dict[str, Any], unit: str, *, scaled: bool) -> list[Group]:
    def value(key: str) -> str:
        if not unit:
            return _minus(_plain_number(stats.get(key)))
        return prefixed(stats.get(key), unit)

    def present(pairs: tuple[tuple[str, str], ...]) -> list[Line]:
        return [Line(label, value(key)) for key, label in pairs if stats.get(key) is not None]

    detail = stats.get("detail") if isinstance(stats.get("detail"), dict) else {}
    acquired = Group(
        "Values as acquired",
        present(
            (("mean", "Mean"), ("std", "Std. deviation"), ("min", "Minimum"), ("max", "Maximum"))
        ),
    )
    plane = Group(
        "Roughness after plane levelling",
        present((("rq", "Rq (RMS)"), ("ra", "Ra (mean absolute)"), ("rz", "Rz (peak to valley)"))),
    )
    for key, label in (("rsk", "Skewness Rsk"), ("rku", "Kurtosis Rku")):
        if _number(stats.get(key)) is not None:
            plane.lines.append(Line(label, _plain_number(stats[key])))
    lines = Group(
        "After line flattening",
        present((("rq_lines", "Rq (RMS)"), ("ra_lines", "Ra (mean absolute)"))),
    )
    surface = Group("Surface")
    fraction = _number(stats.get("coverage_fraction"))
    if fraction is None:
        surface.lines.append(Line("Coverage fraction", "—", "no height threshold was given"))
    else:
        threshold = _number((detail.get("coverage") or {}).get("threshold"))
        note = "" if threshold is None else f"above {prefixed(threshold, unit or 'm')}"
        surface.lines.append(Line("Coverage fraction", f"{fraction * 100:.1f}{NBSP}%", note))
    period = _number(stats.get("period_m"))
    if period is None:
        surface.lines.append(Line("Dominant period", "—", "no clear periodicity"))
    elif not scaled:
        # Without a scan size the image was measured in pixels (processing uses dx = 1).
        surface.lines.append(
            Line("Dominant period", in_unit(period, "px"), "no scan size: in pixels")
        )
    else:
        notes = []
        angle = _number(stats.get("period_angle_deg"))
        if angle is not None:
            notes.append(f"at {_plain_number(angle)}°")
        strength = _number((detail.get("periodicity") or {}).get("strength"))
        if strength is not None:
            notes.append(f"peak strength {strength:.2f}")
        surface.lines.append(Line("Dominant period", in_unit(period, "nm", 1e9), " · ".join(notes)))
    return [g for g in (acquired, plane, lines, surface) if g.lines]


def _spectrum_group(stats: dict[str, Any]) -> Group:
    group = Group("Spectrum", [Line("Points", str(stats.get("points")))])
    group.lines.append(
        Line("Bias range", _span(_volts(stats.get("bias_min_v")), _volts(stats.get("bias_max_v"))))
    )
    for low, high, label, unit in (
        ("current_min_a", "current_max_a", "Current", "A"),
        ("didv_min_a_per_v", "didv_max_a_per_v", "dI/dV", "S"),
    ):
        if stats.get(low) is not None:
            group.lines.append(
                Line(label, _span(prefixed(stats.get(low), unit), prefixed(stats.get(high), unit)))
            )
    if stats.get("onset_v") is not None:
        group.lines.append(Line("Onset", _volts(stats["onset_v"])))
    if stats.get("didv_error"):
        group.lines.append(Line("dI/dV", "—", str(stats["didv_error"])))
    label = "Normalised conductance (dI/dV)/(I/V)"
    epsilon = stats.get("norm_conductance_epsilon_v")
    broadened = ""
    if _number(epsilon) is not None:
        broadened = f"I/V broadened over ε = {prefixed(epsilon, 'V')}"
    if stats.get("norm_conductance_min") is not None:
        value = _span(
            _minus(_plain_number(stats.get("norm_conductance_min"))),
            _minus(_plain_number(stats.get("norm_conductance_max"))),
        )
        group.lines.append(Line(label, value, broadened))
    elif stats.get("norm_conductance_error"):
        why = str(stats["norm_conductance_error"])
        group.lines.append(Line(label, "—", f"{why}; {broadened}" if broadened else why))
    return group


def stat_groups(record: AcquiredFile) -> list[Group]:
    """The stored statistics, grouped: an image's values and roughness (plane-levelled and
    line-flattened), its coverage and period; a spectrum's range and dI/dV."""
    stats = record.stats or {}
    groups: list[Group] = []
    if "rq" in stats or "mean" in stats:
        size = (record.metadata or {}).get("scan_size_m")
        scaled = isinstance(size, list) and len(size) == 2
        groups += _image_groups(stats, _data_unit(record), scaled=scaled)
    if "points" in stats:
        groups.append(_spectrum_group(stats))
    return groups


# --- lineage ----------------------------------------------------------------------------------

# What "1 ML" counts (labbook.science.surfaces), in words beside the coverage.
_ML_MEANS = {
    "substrate_atom": "1 ML = one per substrate surface atom",
    "closed_layer": "1 ML = one closed layer",
    "molecules_per_nm2": "1 ML = one per nm²",
}

_INSTRUMENT_FLAGS = {
    "pressure_above_uhv": ("Pressure above UHV", "warn"),
    "cryogen_transfer_under_way": ("Cryogen transfer under way", "warn"),
    "after_cryogen_transfer": ("Shortly after a cryogen transfer", "warn"),
    "bakeout_under_way": ("Bake-out under way", "warn"),
    "vented": ("Vented", "warn"),
    "load_lock_vented": ("Load lock vented", "note"),
}
_CHANNEL_FLAGS = {
    "stale": ("stale", "note"),
    "above_uhv": ("above UHV", "warn"),
    "not_a_vacuum": ("not a vacuum", "warn"),
    "no_reading": ("no reading", "note"),
}


@dataclass
class Flag:
    label: str
    tone: str = "note"


@dataclass
class ChannelLine:
    name: str
    where: str
    value: str
    age: str
    at: datetime | None
    vacuum: str
    flags: list[Flag]


@dataclass
class EventLine:
    title: str
    at: datetime | None
    detail: str = ""
    params: list[tuple[str, str]] = field(default_factory=list)


@dataclass
class LineageView:
    resolved_at: datetime | None
    acquired_at: datetime | None
    assumed_time: bool
    coverages: list[str]
    exposures: list[str]
    cleaned_at: datetime | None
    anneal: str
    steps_since: int | None
    has_surface: bool
    tip_mounted_at: datetime | None
    tip_events: list[EventLine]
    apex: str
    has_tip_state: bool
    flags: list[Flag]
    channels: list[ChannelLine]
    events: list[EventLine]
    has_instrument_state: bool


def _before(age_s: Any) -> str:
    """A reading's age at acquisition: '9 min before', counted back from that instant."""
    x = _number(age_s)
    if x is None:
        return ""
    text = format_age(timedelta(seconds=x))
    return "at that instant" if text == "just now" else text.replace(" ago", " before")


def _channel_value(c: dict[str, Any]) -> str:
    x = _number(c.get("value"))
    if x is None:
        return "—"
    unit = str(c.get("unit") or "")
    return format_quantity(x, unit, quantity=str(c.get("quantity") or ""))


def _load_lock_channels(record: AcquiredFile) -> set[int]:
    """Channels in a load lock: above UHV there is usual between sample loads, not alarming."""
    if record.instrument is None:
        return set()
    return {
        c.pk
        for c in instrument_queries.channels_of(record.instrument).select_related("chamber")
        if c.chamber is not None and c.chamber.kind == "load_lock"
    }


def lineage_view(record: AcquiredFile) -> LineageView:
    snapshot = record.lineage or {}
    surface = snapshot.get("surface_state") or {}
    tip_state = snapshot.get("tip_state") or {}
    state = snapshot.get("instrument_state") or {}
    coverages = []
    for c in surface.get("coverages") or []:
        value, sigma = _number(c.get("coverage_ml")), _number(c.get("uncertainty_ml"))
        if value is None:
            continue
        shown = (
            with_uncertainty(value, sigma, "ML") if sigma else _plain(format_quantity(value, "ML"))
        )
        text = f"{formula(c.get('material', ''))}: {shown}"
        if c.get("definition") in _ML_MEANS:
            text += f" ({_ML_MEANS[c['definition']]})"
        coverages.append(text)
    exposures = [
        f"{formula(gas)}: {_plain(format_quantity(value, 'L'))}"
        for gas, value in sorted((surface.get("exposures_langmuir") or {}).items())
        if _number(value) is not None
    ]
    kinds = dict(Conditioning.Kind.choices)
    tip_events = [
        EventLine(
            title=str(kinds.get(e.get("kind"), e.get("kind", ""))).capitalize(),
            at=_when(e.get("at")),
            detail=str(e.get("outcome") or ""),
            params=[
                (param_label(k), param_text(k, v))
                for k, v in (e.get("params") or {}).items()
                if isinstance(e.get("params"), dict)
            ],
        )
        for e in tip_state.get("events") or []
    ]
    load_lock = _load_lock_channels(record) if state.get("channels") else set()
    channels = []
    for c in state.get("channels") or []:
        flags = []
        for name in c.get("flags") or []:
            label, tone = _CHANNEL_FLAGS.get(name, (str(name).replace("_", " "), "note"))
            if name == "above_uhv" and c.get("channel") in load_lock:
                tone = "note"
            flags.append(Flag(label, tone))
        channels.append(
            ChannelLine(
                name=str(c.get("name", "")),
                where=str(c.get("quantity", "")).replace("_", " "),
                value=_channel_value(c),
                age=_before(c.get("age_s")),
                at=_when(c.get("t")),
                vacuum=str(c.get("vacuum_range") or ""),
                flags=flags,
            )
        )
    above = [
        c.get("channel")
        for c in state.get("channels") or []
        if "above_uhv" in (c.get("flags") or [])
    ]
    flags = []
    for name in state.get("flags") or []:
        label, tone = _INSTRUMENT_FLAGS.get(
            name, (str(name).replace("_", " ").capitalize(), "note")
        )
        if name == "pressure_above_uhv" and above and all(c in load_lock for c in above):
            # As the instrument page says it: a load lock lives above UHV between loads.
            label, tone = "Pressure above UHV in the load lock only", "note"
        flags.append(Flag(label, tone))
    events = [
        EventLine(
            title=str(e.get("kind", "")).replace("_", " ").capitalize(),
            at=_when(e.get("start")),
            detail=str(e.get("summary") or ""),
        )
        for e in state.get("events") or []
    ]
    anneal = _number(surface.get("anneal_time_s"))
    return LineageView(
        resolved_at=record.lineage_resolved_at,
        acquired_at=record.acquired_at,
        assumed_time=(record.metadata or {}).get("acquired_at_assumed") == "arrival",
        coverages=coverages,
        exposures=exposures,
        cleaned_at=_when(surface.get("cleaned_at")),
        anneal=duration_text(anneal) if anneal else "",
        steps_since=surface.get("steps_since_cleaning"),
        has_surface=bool(surface),
        tip_mounted_at=_when(tip_state.get("mounted_at")),
        tip_events=tip_events,
        apex=formula(tip_state.get("apex_species") or ""),
        has_tip_state=bool(tip_state),
        flags=flags,
        channels=channels,
        events=events,
        has_instrument_state=bool(state),
    )
