"""The JSON API router of provenance: one dataset's provenance as JSON and as W3C PROV-JSON,
and RO-Crates of one dataset or of a chosen set (a paper figure).

Reads, as the files API's: any lab member or token (the API's authentication answers 401 to
no credentials and 403 to someone in no lab group). The building is in queries, prov, crate.
"""

# No "from __future__ import annotations": ninja reads the views' parameter types at import.

from django.http import HttpResponse, StreamingHttpResponse
from ninja import Query, Router, Schema
from ninja.errors import HttpError
from pydantic import Field

from labbook.datafiles.models import AcquiredFile
from labbook.provenance import crate, prov, queries

router = Router(tags=["provenance"])


def _provenance(file_id: int, *, neighbours: bool = True) -> queries.Provenance:
    try:
        return queries.provenance_of(file_id, neighbours=neighbours)
    except AcquiredFile.DoesNotExist:
        raise HttpError(404, f"no dataset {file_id}") from None


@router.get("/files/{file_id}/provenance")
def file_provenance(request, file_id: int):
    """Everything the dataset depends on: the sample and its preparations since the last
    cleaning (every step with its values and derived doses), the surface state, the tip and
    its conditioning since mounting, the instrument's state at acquisition, the operator and
    session, what labbook computed, the checksum, and the neighbouring datasets."""
    return queries.as_json(_provenance(file_id))


@router.get("/files/{file_id}/provenance.prov.json")
def file_prov_json(request, file_id: int):
    """The provenance as a W3C PROV-JSON document (mapping: docs/provenance.md)."""
    body = prov.prov_json(_provenance(file_id, neighbours=False))
    response = HttpResponse(body, content_type=prov.PROV_JSON_TYPE)
    response["Content-Disposition"] = f'attachment; filename="dataset-{file_id}.prov.json"'
    return response


def _crate_response(found: list[queries.Provenance], **labels: str) -> StreamingHttpResponse:
    response = StreamingHttpResponse(
        crate.stream_crate(found, **labels), content_type="application/zip"
    )
    response["Content-Disposition"] = f'attachment; filename="{crate.crate_filename(found)}"'
    return response


@router.get("/files/{file_id}/crate.zip")
def file_crate(request, file_id: int):
    """An RO-Crate 1.1 (ZIP) of the dataset: its bytes, preview, checksums and provenance."""
    return _crate_response([_provenance(file_id, neighbours=False)])


def _many(ids: list[int]) -> list[queries.Provenance]:
    unique = list(dict.fromkeys(ids))
    if not unique:
        raise HttpError(422, "ids: give at least one dataset id")
    if len(unique) > crate.MAX_DATASETS:
        raise HttpError(422, f"ids: at most {crate.MAX_DATASETS} datasets go into one crate")
    found = set(AcquiredFile.objects.filter(pk__in=unique).values_list("pk", flat=True))
    missing = [i for i in unique if i not in found]
    if missing:
        raise HttpError(404, "no dataset " + ", ".join(str(i) for i in missing))
    return [queries.provenance_of(i, neighbours=False) for i in unique]


class CrateQuery(Schema):
    ids: str = Field(..., description="dataset ids, comma-separated: 1,2,3", max_length=5000)


def _parse_ids(text: str) -> list[int]:
    parts = [p.strip() for p in text.split(",") if p.strip()]
    bad = [p for p in parts if not p.isdigit()]
    if bad:
        raise HttpError(422, f"ids: {bad[0]!r} is not a dataset id (give numbers: 1,2,3)")
    return [int(p) for p in parts]


@router.get("/crates.zip")
def crate_of_datasets(request, query: Query[CrateQuery]):
    """An RO-Crate 1.1 (ZIP) of a chosen set of datasets, e.g. the panels of a figure."""
    return _crate_response(_many(_parse_ids(query.ids)))


class CrateIn(Schema):
    ids: list[int] = Field(..., min_length=1, max_length=crate.MAX_DATASETS)
    name: str = Field("", max_length=300, description="the crate's title, e.g. Figure 2")
    description: str = Field("", max_length=5000)


@router.post("/crates")
def create_crate(request, payload: CrateIn):
    """The same as ``GET /crates.zip`` with a title and a description (a paper figure)."""
    return _crate_response(_many(payload.ids), name=payload.name, description=payload.description)
