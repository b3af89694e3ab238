"""The JSON API router of acquired files: ingest, search, one dataset, its thumbnail and bytes."""

# No "from __future__ import annotations": ninja reads the views' parameter types at import.

import json
from datetime import datetime
from typing import Any

from django.http import FileResponse, Http404, HttpResponse
from django.shortcuts import get_object_or_404
from ninja import File, Form, Query, Router, Schema, Status
from ninja.errors import HttpError
from ninja.files import UploadedFile
from ninja.responses import NinjaJSONEncoder
from pydantic import Field

from labbook.core.schemas import AwareTime
from labbook.datafiles import actions, queries
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.storage import UploadTooLarge, open_stored
from labbook.instruments.models import Instrument
from labbook.instruments.queries import instrument_named

router = Router(tags=["files"])


class CoverageOut(Schema):
    material: str
    coverage_ml: float
    uncertainty_ml: float | None


class FileOut(Schema):
    id: int
    sha256: str
    status: str
    error: str
    original_name: str
    size_bytes: int
    kind: str
    acquired_at: datetime | None
    bias_v: float | None
    setpoint_a: float | None
    temperature_k: float | None
    metadata: dict[str, Any]
    stats: dict[str, Any]
    instrument: int | None = Field(None, alias="instrument_id")
    sample: int | None = Field(None, alias="sample_id")
    tip: int | None = Field(None, alias="tip_id")
    operator: int | None = Field(None, alias="operator_id")
    preparation: int | None = Field(None, alias="preparation_id")
    coverage_ml: float | None
    coverages: list[CoverageOut]
    thumbnail_url: str | None
    uploaded_at: datetime = Field(alias="created_at")

    @staticmethod
    def resolve_coverages(obj: AcquiredFile) -> list:
        return list(obj.coverages.all())

    @staticmethod
    def resolve_thumbnail_url(obj: AcquiredFile) -> str | None:
        return f"/api/v1/files/{obj.pk}/thumbnail.png" if obj.thumbnail_name else None


class FileDetailOut(FileOut):
    lineage: dict[str, Any]
    reader: str
    source: str
    raw_header: dict[str, Any]
    given_metadata: dict[str, Any]


#: Stats blocks only the dataset itself answers: the full statistics with the histogram
#: (~3 KB a row) and a spectrum's traces (up to 512 points each).
LIST_OMITTED_STATS = frozenset({"detail", "traces"})


class FileListItem(FileOut):
    """A search result: the answer of ``GET /files/{id}`` less the ``stats.detail`` block (the
    full statistics with the histogram, ~3 KB a row) and a spectrum's ``stats.traces`` (up to
    4 × 512 numbers for its plot, ~40 KB), which only the dataset itself answers."""

    @staticmethod
    def resolve_stats(obj: AcquiredFile) -> dict[str, Any]:
        return {key: value for key, value in obj.stats.items() if key not in LIST_OMITTED_STATS}


class FilePage(Schema):
    items: list[FileListItem]
    next_offset: int | None


class FileFilters(Schema):
    bias_min: float | None = Field(None, description="V", allow_inf_nan=False)
    bias_max: float | None = Field(None, description="V", allow_inf_nan=False)
    setpoint_min: float | None = Field(None, description="A", allow_inf_nan=False)
    setpoint_max: float | None = Field(None, description="A", allow_inf_nan=False)
    coverage_min: float | None = Field(
        None, description="ML (of adsorbate if given)", allow_inf_nan=False
    )
    coverage_max: float | None = Field(
        None, description="ML (of adsorbate if given)", allow_inf_nan=False
    )
    adsorbate: str | None = None
    sample: int | None = None
    tip: int | None = None
    instrument: int | None = None
    kind: AcquiredFile.Kind | None = None
    status: AcquiredFile.Status | None = None
    since: AwareTime | None = None
    until: AwareTime | None = None
    q: str | None = Field(None, max_length=200)
    limit: int = Field(50, ge=1, le=500)
    offset: int = Field(0, ge=0)


def _parse_metadata(raw: str | None) -> dict[str, Any]:
    if raw in (None, ""):
        return {}
    try:
        value = json.loads(raw)
    except ValueError:
        raise HttpError(
            422, "metadata is not JSON: send a JSON object of metadata fields"
        ) from None
    if not isinstance(value, dict):
        raise HttpError(422, "metadata must be a JSON object of metadata fields")
    return value


def _instrument_for(request, metadata: dict[str, Any]) -> Instrument | None:
    """The instrument the file is for: named in the metadata, else the token's own."""
    named = metadata.get("instrument")
    instrument = None
    if named not in (None, ""):
        instrument = instrument_named(named)
        if instrument is None:
            raise HttpError(422, f"metadata.instrument: no instrument {named!r}")
    elif request.auth.instrument_id is not None:
        instrument = Instrument.objects.get(pk=request.auth.instrument_id)
    request.auth.require_write(instrument_id=None if instrument is None else instrument.pk)
    return instrument


@router.post("/files", response={200: FileOut, 201: FileOut})
def upload_file(request, file: File[UploadedFile], metadata: Form[str | None] = None):
    """Ingest one file (multipart ``file``, optional ``metadata`` JSON). The bytes are stored
    under their SHA-256 at once; reading, statistics and the thumbnail follow in a worker.
    The same bytes again answer 200 with the existing dataset."""
    given = _parse_metadata(metadata)
    instrument = _instrument_for(request, given)
    try:
        result = actions.ingest(
            file,
            file.name or "upload",
            metadata=given,
            actor=request.auth.user,
            instrument=instrument,
        )
    except UploadTooLarge as exc:
        # An upload over the cap is refused, not kept (unlike ``ingest``/``watch``): the
        # request body itself is what the cap bounds, so a client cannot make the server
        # spool an unbounded body; the client still has the file and can ingest it by path.
        raise HttpError(413, str(exc)) from exc
    return Status(201 if result.created else 200, result.file)


#: What a search row carries (``FileListItem``'s fields, by their column names).
_LIST_COLUMNS = (
    "id", "sha256", "status", "error", "original_name", "size_bytes", "kind", "acquired_at",
    "bias_v", "setpoint_a", "temperature_k", "metadata", "stats", "instrument_id", "sample_id",
    "tip_id", "operator_id", "preparation_id", "coverage_ml", "thumbnail_name", "created_at",
)  # fmt: skip


def _list_item(row: dict[str, Any]) -> dict[str, Any]:
    """A search row as ``FileListItem`` answers it (tests/datafiles/test_api_files.py holds
    the two to the same output)."""
    item = {key: row[key] for key in _LIST_COLUMNS[:12]}  # id … metadata, as stored
    item["stats"] = {k: v for k, v in (row["stats"] or {}).items() if k not in LIST_OMITTED_STATS}
    for name in ("instrument", "sample", "tip", "operator", "preparation"):
        item[name] = row[f"{name}_id"]
    item["coverage_ml"] = row["coverage_ml"]
    item["coverages"] = row["coverages"]
    item["thumbnail_url"] = (
        f"/api/v1/files/{row['id']}/thumbnail.png" if row["thumbnail_name"] else None
    )
    item["uploaded_at"] = row["created_at"]
    return item


@router.get("/files", response=FilePage)
def search_files(request, filters: Query[FileFilters]):
    """Datasets by the conditions they were taken under, newest first. ``next_offset`` is
    null on the last page (no total count: counting a million rows would cost more than the
    page)."""
    chosen = filters.dict(exclude={"limit", "offset"})
    inverted = queries.inverted_ranges(chosen)
    if inverted:
        raise HttpError(
            422, "; ".join(f"{high} is below {low}: swap them" for low, high in inverted)
        )
    criteria = queries.FileSearch(**chosen)
    # Plain rows, rendered as they are: model instances and the schema's validation of 50
    # of them took twice as long as the search itself. The page never shows the lineage
    # snapshot, the raw header or the metadata as sent, so they are not fetched.
    rows, more = queries.search_rows(
        criteria, columns=_LIST_COLUMNS, limit=filters.limit, offset=filters.offset
    )
    page = {
        "items": [_list_item(row) for row in rows],
        "next_offset": filters.offset + filters.limit if more else None,
    }
    return HttpResponse(json.dumps(page, cls=NinjaJSONEncoder), content_type="application/json")


@router.get("/files/{file_id}", response=FileDetailOut)
def get_file(request, file_id: int):
    return get_object_or_404(AcquiredFile.objects.prefetch_related("coverages"), pk=file_id)


@router.get("/files/{file_id}/thumbnail.png")
def file_thumbnail(request, file_id: int):
    record = get_object_or_404(AcquiredFile, pk=file_id)
    if not record.thumbnail_name:
        raise Http404("this dataset has no thumbnail (yet)")
    response = FileResponse(open_stored(record.thumbnail_name), content_type="image/png")
    # The thumbnail of a content-addressed file never changes.
    response["Cache-Control"] = "private, max-age=86400, immutable"
    return response


@router.get("/files/{file_id}/download")
def download_file(request, file_id: int):
    record = get_object_or_404(AcquiredFile, pk=file_id)
    return FileResponse(
        open_stored(record.storage_name),
        as_attachment=True,
        filename=record.original_name,
        content_type="application/octet-stream",
    )


class CorrectionIn(Schema):
    instrument: int | None = None
    sample: int | None = None
    tip: int | None = None
    operator: int | None = None
    acquired_at: AwareTime | None = None
    bias_v: float | None = None
    setpoint_a: float | None = None
    kind: AcquiredFile.Kind | None = None


@router.post("/files/{file_id}/corrections", response=FileDetailOut)
def correct_file(request, file_id: int, payload: CorrectionIn):
    """Correct what was logged about a dataset; its lineage is resolved again."""
    record = get_object_or_404(AcquiredFile, pk=file_id)
    request.auth.require_write(instrument_id=record.instrument_id)
    changes = payload.dict(exclude_unset=True)
    if changes.get("instrument") is not None:
        request.auth.require_write(instrument_id=changes["instrument"])
    return actions.correct_file(record, changes=changes, actor=request.auth.user)
