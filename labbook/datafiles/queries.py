"""Read-side queries of acquired files: search by the conditions a dataset was taken under,
and the datasets of a tip, a sample or an instrument."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from django.db.models import Exists, OuterRef, Q, QuerySet
from django.db.models.expressions import RawSQL

from labbook.datafiles.models import BIAS_BAND_V, AcquiredFile, FileCoverage

#: A bias range over more bands than this is searched on the plain newest-first index: it
#: matches enough datasets that a page is found after a short walk there anyway (a 0.4 V
#: range of 2 V: 1 in 5), and every band is one more branch to plan (~0.15 ms each).
MAX_BIAS_BANDS = 4


@dataclass(frozen=True)
class FileSearch:
    """What a search asks for; every bound is inclusive, units as the names say."""

    bias_min: float | None = None
    bias_max: float | None = None
    setpoint_min: float | None = None
    setpoint_max: float | None = None
    coverage_min: float | None = None
    coverage_max: float | None = None
    adsorbate: str | None = None
    sample: int | None = None
    tip: int | None = None
    instrument: int | None = None
    kind: str | None = None
    status: str | None = None
    since: datetime | None = None
    until: datetime | None = None
    q: str | None = None


#: The (low, high) pairs of a search: each an inclusive range, the low end first.
RANGES = (
    ("bias_min", "bias_max"),
    ("setpoint_min", "setpoint_max"),
    ("coverage_min", "coverage_max"),
    ("since", "until"),
)


def inverted_ranges(values: Mapping[str, Any]) -> list[tuple[str, str]]:
    """The (low, high) pairs of :data:`RANGES` given the wrong way round: such a search finds
    nothing, which reads as "no such data" when it means "swap them"."""
    return [
        (low, high)
        for low, high in RANGES
        if values.get(low) is not None
        and values.get(high) is not None
        and values[low] > values[high]
    ]


def files() -> QuerySet[AcquiredFile]:
    return AcquiredFile.objects.filter(retired_at__isnull=True)


def _between(name: str, low, high) -> Q:
    condition = Q()
    if low is not None:
        condition &= Q(**{f"{name}__gte": low})
    if high is not None:
        condition &= Q(**{f"{name}__lte": high})
    return condition


def search(criteria: FileSearch) -> QuerySet[AcquiredFile]:
    """Datasets matching every given criterion, newest first.

    Coverage without an adsorbate compares the total nominal coverage stored on the file (the
    composite (bias_v, coverage_ml) index serves bias + coverage); with an adsorbate it asks the
    per-adsorbate rows ((material, coverage_ml) index).
    """
    found = files().filter(
        _between("bias_v", criteria.bias_min, criteria.bias_max),
        _between("setpoint_a", criteria.setpoint_min, criteria.setpoint_max),
        _between("acquired_at", criteria.since, criteria.until),
    )
    wants_coverage = criteria.coverage_min is not None or criteria.coverage_max is not None
    if criteria.adsorbate:
        per_adsorbate = FileCoverage.objects.filter(
            file=OuterRef("pk"),
            material=criteria.adsorbate,
            **(
                {"coverage_ml__gte": criteria.coverage_min}
                if criteria.coverage_min is not None
                else {}
            ),
            **(
                {"coverage_ml__lte": criteria.coverage_max}
                if criteria.coverage_max is not None
                else {}
            ),
        )
        found = found.filter(Exists(per_adsorbate))
    elif wants_coverage:
        found = found.filter(_between("coverage_ml", criteria.coverage_min, criteria.coverage_max))
    for name in ("sample", "tip", "instrument"):
        value = getattr(criteria, name)
        if value is not None:
            found = found.filter(**{f"{name}_id": value})
    if criteria.kind:
        found = found.filter(kind=criteria.kind)
    if criteria.status:
        found = found.filter(status=criteria.status)
    if criteria.q:
        text = criteria.q.strip()
        found = found.filter(
            Q(original_name__icontains=text)
            | Q(channel_name__icontains=text)
            | Q(sample__name__icontains=text)
        )
    return found.order_by("-acquired_at", "-id")


def _bias_bands(criteria: FileSearch) -> range | None:
    """The bias bands (AcquiredFile.bias_band) a closed bias range covers, or None."""
    low, high = criteria.bias_min, criteria.bias_max
    if low is None or high is None or not (math.isfinite(low) and math.isfinite(high)):
        return None
    if low > high:
        return None
    # The same IEEE division as the column's floor(bias_v / BIAS_BAND_V): the bands agree.
    first, last = math.floor(low / BIAS_BAND_V), math.floor(high / BIAS_BAND_V)
    if last - first + 1 > MAX_BIAS_BANDS:
        return None
    return range(first, last + 1)


def page_ids_sql(criteria: FileSearch, *, offset: int, limit: int) -> tuple[str, tuple]:
    """SQL and parameters for the ids of one page of a search, newest first.

    With a closed bias range over a few bands, it is one branch per band under UNION ALL:
    PostgreSQL then merges the bands' runs of file_bias_band_newest (each already newest
    first) and stops after the page, where walking file_newest_covering skips every dataset
    outside the bias range (10–20× more entries for a 0.1 V range in 2 V).
    """
    found = search(criteria)
    bands = _bias_bands(criteria)
    if bands is None:
        query = found.values_list("id", flat=True)[offset : offset + limit].query
        return query.sql_with_params()
    branches, params = [], []
    for band in bands:
        # Each branch sorted and limited on its own: that order is what lets the planner merge
        # the branches lazily (a Merge Append) instead of reading them all and sorting.
        branch = found.filter(bias_band=band).values_list("id", "acquired_at")
        sql, branch_params = branch[: offset + limit].query.sql_with_params()
        # Only SQL the ORM compiled, with its parameters kept apart, and an integer alias.
        branches.append(f'SELECT "id", "acquired_at" FROM ({sql}) AS band_{band - bands[0]}')  # noqa: S608
        params.extend(branch_params)
    sql = (
        f'SELECT "id" FROM ({" UNION ALL ".join(branches)}) AS banded '  # noqa: S608
        'ORDER BY "acquired_at" DESC, "id" DESC LIMIT %s OFFSET %s'
    )
    return sql, (*params, limit, offset)


def newest_page(criteria: FileSearch, *, offset: int, limit: int) -> QuerySet[AcquiredFile]:
    """One page of a search, newest first, as a queryset to pick columns and relations from
    (it is already limited: do not slice it again)."""
    if _bias_bands(criteria) is None:
        return search(criteria)[offset : offset + limit]
    sql, params = page_ids_sql(criteria, offset=offset, limit=limit)
    ids = RawSQL(sql, params)  # noqa: S611 - compiled by the ORM above, parameters apart
    return AcquiredFile.objects.filter(pk__in=ids).order_by("-acquired_at", "-id")


def search_rows(
    criteria: FileSearch, *, columns: tuple[str, ...], limit: int, offset: int = 0
) -> tuple[list[dict], bool]:
    """One page of a search as plain rows of ``columns``, each with its ``coverages`` (dicts
    of material, coverage_ml, uncertainty_ml), and whether another page follows. Two queries,
    and no model instances: building and validating 50 of them cost more than the search."""
    rows = list(newest_page(criteria, offset=offset, limit=limit + 1).values(*columns))
    more = len(rows) > limit
    rows = rows[:limit]
    by_file: dict[int, list[dict]] = {row["id"]: [] for row in rows}
    if by_file:
        coverages = (
            FileCoverage.objects.filter(file_id__in=list(by_file))
            .order_by("pk")
            .values_list("file_id", "material", "coverage_ml", "uncertainty_ml")
        )
        for file_id, material, coverage_ml, uncertainty_ml in coverages:
            by_file[file_id].append(
                {"material": material, "coverage_ml": coverage_ml, "uncertainty_ml": uncertainty_ml}
            )
    for row in rows:
        row["coverages"] = by_file[row["id"]]
    return rows, more


def files_of_tip(tip) -> QuerySet[AcquiredFile]:
    return files().filter(tip=tip).order_by("-acquired_at", "-id")


def files_of_sample(sample) -> QuerySet[AcquiredFile]:
    return files().filter(sample=sample).order_by("-acquired_at", "-id")


def pending_files(queued_before: datetime) -> QuerySet[AcquiredFile]:
    """Files still waiting: never queued, or queued long enough ago that the message is lost."""
    return AcquiredFile.objects.filter(status=AcquiredFile.Status.PENDING).filter(
        Q(queued_at__isnull=True) | Q(queued_at__lt=queued_before)
    )
