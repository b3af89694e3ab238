"""A search with a bias range reads its page through the per-band index (one branch per
0.1 V band, merged newest first). These tests hold that page to the plain search's own answer
(``search(criteria)[offset:offset + limit]``, the definition of a page) on awkward data: biases
on band edges, negative and missing biases, ties in time, retired datasets, per-adsorbate
coverage, paging deep and ranges too wide for bands."""

from __future__ import annotations

import hashlib
import math
import random
from datetime import UTC, datetime, timedelta

import pytest

from labbook.datafiles.models import BIAS_BAND_V, AcquiredFile, FileCoverage
from labbook.datafiles.queries import (
    MAX_BIAS_BANDS,
    FileSearch,
    _bias_bands,
    newest_page,
    page_ids_sql,
    search,
)

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 5, 4, 8, 0, tzinfo=UTC)

#: Biases that sit on or next to band edges, where floor(bias / 0.1) is easy to get wrong
#: (0.3 / 0.1 is 2.9999999999999996 in IEEE 754 doubles, so 0.3 V is in band 2).
EDGE_BIASES = [0.0, -0.0, 0.1, 0.3, -0.3, 0.7, -0.7, 1.0, -1.0, 1e-17, -1e-17, 0.2999999, 0.30001]


@pytest.fixture
def many_files():
    rng = random.Random(11)
    rows = []
    for index in range(420):
        if index < len(EDGE_BIASES) * 3:
            bias = EDGE_BIASES[index % len(EDGE_BIASES)]
        elif index % 37 == 0:
            bias = None
        else:
            bias = round(rng.uniform(-1.5, 1.5), rng.choice([1, 2, 6]))
        # Every fifth pair of datasets shares its time, so the id breaks the tie.
        minutes = index - index % 2 if index % 5 == 0 else index
        rows.append(
            AcquiredFile(
                sha256=hashlib.sha256(f"band-{index}".encode()).hexdigest(),
                size_bytes=10,
                storage_name=f"acquired/band-{index}",
                original_name=f"band-{index}.npy",
                status="ready",
                kind="topograph" if index % 3 else "spectrum",
                bias_v=bias,
                setpoint_a=10 ** rng.uniform(-11, -9),
                coverage_ml=round(rng.uniform(0, 2), 2),
                acquired_at=None if index % 53 == 0 else T0 + timedelta(minutes=minutes),
                retired_at=T0 if index % 41 == 0 else None,
            )
        )
    made = AcquiredFile.objects.bulk_create(rows)
    FileCoverage.objects.bulk_create(
        FileCoverage(file=row, material="NaCl", coverage_ml=round(rng.uniform(0, 1), 2))
        for row in made
        if row.pk % 2
    )
    return made


def _plain(criteria: FileSearch, offset: int, limit: int) -> list[int]:
    return list(search(criteria).values_list("id", flat=True)[offset : offset + limit])


def _banded(criteria: FileSearch, offset: int, limit: int) -> list[int]:
    return list(newest_page(criteria, offset=offset, limit=limit).values_list("id", flat=True))


def test_the_database_puts_each_bias_in_the_band_python_computes(many_files):
    for row in AcquiredFile.objects.exclude(bias_v=None).values("bias_v", "bias_band"):
        assert row["bias_band"] == math.floor(row["bias_v"] / BIAS_BAND_V), row
    # 0.3 V lies in band 2, not 3 (IEEE 754: 0.3 / 0.1 = 2.9999999999999996).
    assert AcquiredFile.objects.filter(bias_v=0.3).values_list("bias_band", flat=True)[0] == 2


@pytest.mark.parametrize(
    "low, high",
    [
        (0.3, 0.3),  # one bias exactly, on an edge
        (0.3, 0.4),
        (-0.3, 0.0),
        (-0.0, 0.1),
        (0.2999999, 0.30001),
        (-1.0, -0.71),
        (0.05, 0.15),
        (-1.5, -1.15),
        (-0.21, 0.05),  # four bands (-3 … 0), the most that are merged
    ],
)
def test_a_bias_range_page_is_the_plain_search_page(many_files, low, high):
    assert _bias_bands(FileSearch(bias_min=low, bias_max=high)) is not None
    for extra in ({}, {"coverage_min": 0.5, "coverage_max": 1.4}, {"kind": "topograph"}):
        criteria = FileSearch(bias_min=low, bias_max=high, **extra)
        for offset, limit in ((0, 50), (0, 3), (7, 5), (40, 25), (500, 10)):
            assert _banded(criteria, offset, limit) == _plain(criteria, offset, limit), (
                criteria,
                offset,
                limit,
            )


def test_random_ranges_with_every_filter_agree(many_files):
    rng = random.Random(3)
    for _ in range(60):
        low = rng.uniform(-1.6, 1.4)
        criteria = FileSearch(
            bias_min=low,
            bias_max=low + rng.choice([0.0, 0.05, 0.1, 0.2, 0.3, 0.9]),
            coverage_min=rng.choice([None, 0.2]),
            coverage_max=rng.choice([None, 1.5]),
            adsorbate=rng.choice([None, "NaCl"]),
            setpoint_max=rng.choice([None, 1e-10]),
            q=rng.choice([None, "band-1"]),
        )
        offset = rng.choice([0, 0, 10])
        assert _banded(criteria, offset, 20) == _plain(criteria, offset, 20), criteria


def test_wide_open_or_inverted_ranges_fall_back_to_the_plain_search(many_files):
    wide = FileSearch(bias_min=-0.7, bias_max=-0.7 + MAX_BIAS_BANDS * BIAS_BAND_V + 0.01)
    open_ended = FileSearch(bias_min=0.2)
    inverted = FileSearch(bias_min=0.5, bias_max=0.1)
    for criteria in (wide, open_ended, inverted, FileSearch()):
        assert _bias_bands(criteria) is None
        assert "UNION ALL" not in page_ids_sql(criteria, offset=0, limit=5)[0]
        assert _banded(criteria, 3, 30) == _plain(criteria, 3, 30)
    assert _plain(inverted, 0, 50) == []


def test_the_banded_sql_merges_one_branch_per_band(many_files):
    sql, params = page_ids_sql(FileSearch(bias_min=0.25, bias_max=0.45), offset=10, limit=50)
    assert sql.count("UNION ALL") == 2  # bands 2, 3 and 4
    assert params[-2:] == (50, 10)  # LIMIT, OFFSET of the merged page
