"""``GET /files`` renders plain rows without the schema's validation (for speed): these tests
hold its answer to exactly what ``FileListItem`` makes of the same datasets, field by field,
so the fast path can never drift from the documented schema."""

from __future__ import annotations

import io
import json
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from django.test import Client
from ninja.responses import NinjaJSONEncoder

from labbook.accounts.actions import mint_token
from labbook.datafiles.actions import replace_coverages
from labbook.datafiles.api import FilePage
from labbook.datafiles.models import AcquiredFile

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)


def _npy(seed: int) -> bytes:
    buffer = io.BytesIO()
    rng = np.random.default_rng(seed)
    np.save(buffer, rng.standard_normal((32, 32)).astype(np.float32), allow_pickle=False)
    return buffer.getvalue()


@pytest.fixture
def datasets(member, instrument, settings, tmp_path, django_capture_on_commit_callbacks):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    client = Client()
    made = []
    for index in range(4):
        body = {"file": io.BytesIO(_npy(index))}
        body["file"].name = f"scan-{index}.npy"
        body["metadata"] = json.dumps(
            {
                "kind": "topograph",
                "bias_v": 0.1 * index,
                "setpoint_a": 1e-10,
                "scan_size_m": [1e-8, 1e-8],
                "instrument": instrument.pk,
                "acquired_at": (T0 + timedelta(minutes=index)).isoformat(),
            }
        )
        with django_capture_on_commit_callbacks(execute=True):
            response = client.post(
                "/api/v1/files", body, headers={"Authorization": f"Bearer {raw}"}
            )
        assert response.status_code == 201, response.content
        made.append(response.json()["id"])
    # Two adsorbates on one dataset, one on another, none on the rest.
    first = AcquiredFile.objects.get(pk=made[0])
    replace_coverages(
        first,
        [
            {"material": "NaCl", "coverage_ml": 0.4, "uncertainty_ml": 0.05},
            {"material": "C60", "coverage_ml": 0.1},
        ],
    )
    third = AcquiredFile.objects.get(pk=made[2])
    replace_coverages(third, [{"material": "Fe", "coverage_ml": 0.02}])
    # A stats block only the dataset answers must not reach the list.
    second = AcquiredFile.objects.get(pk=made[1])
    second.stats = {**second.stats, "traces": {"bias_v": [0.0, 1.0]}}
    second.save()
    return raw, made


def _schema_page(ids: list[int], next_offset: int | None) -> dict:
    """The page as ``FilePage`` validates and renders it from model instances."""
    rows = AcquiredFile.objects.filter(pk__in=ids).prefetch_related("coverages")
    by_id = {row.pk: row for row in rows}
    page = FilePage.model_validate(
        {"items": [by_id[i] for i in ids], "next_offset": next_offset}
    ).model_dump(by_alias=False)
    for item in page["items"]:
        item["coverages"].sort(key=lambda c: c["material"])
    return json.loads(json.dumps(page, cls=NinjaJSONEncoder))


def test_the_search_page_is_what_the_schema_makes_of_the_same_rows(datasets):
    raw, made = datasets
    response = Client().get(
        "/api/v1/files", {"limit": 3}, headers={"Authorization": f"Bearer {raw}"}
    )
    assert response.status_code == 200
    assert response["Content-Type"] == "application/json"
    answer = response.json()
    for item in answer["items"]:
        item["coverages"].sort(key=lambda c: c["material"])
    expected = _schema_page(made[::-1][:3], 3)
    assert answer == expected
    # The fields a client relies on, spelled out (the schema's aliases and computed fields).
    newest = answer["items"][0]
    assert newest["id"] == made[3]
    assert newest["thumbnail_url"] == f"/api/v1/files/{made[3]}/thumbnail.png"
    assert newest["instrument"] is not None and "instrument_id" not in newest
    assert newest["uploaded_at"].endswith("Z")
    assert "detail" not in newest["stats"] and newest["stats"]["rq"] > 0


def test_coverages_and_omitted_stats_blocks_follow_each_dataset(datasets):
    raw, made = datasets
    answer = Client().get(
        "/api/v1/files", {"limit": 10}, headers={"Authorization": f"Bearer {raw}"}
    ).json()
    by_id = {item["id"]: item for item in answer["items"]}
    assert answer["next_offset"] is None
    assert sorted(by_id[made[0]]["coverages"], key=lambda c: c["material"]) == [
        {"material": "C60", "coverage_ml": 0.1, "uncertainty_ml": None},
        {"material": "NaCl", "coverage_ml": 0.4, "uncertainty_ml": 0.05},
    ]
    assert by_id[made[2]]["coverages"] == [
        {"material": "Fe", "coverage_ml": 0.02, "uncertainty_ml": None}
    ]
    assert by_id[made[3]]["coverages"] == []
    assert "traces" not in by_id[made[1]]["stats"]
    # The dataset itself still answers the traces.
    one = Client().get(f"/api/v1/files/{made[1]}", headers={"Authorization": f"Bearer {raw}"})
    assert one.json()["stats"]["traces"] == {"bias_v": [0.0, 1.0]}
    # Second page: the offset moves on, the order stays newest first.
    second = Client().get(
        "/api/v1/files", {"limit": 2, "offset": 2}, headers={"Authorization": f"Bearer {raw}"}
    ).json()
    assert [item["id"] for item in second["items"]] == [made[1], made[0]]
