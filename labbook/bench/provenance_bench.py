"""Benchmarks of the provenance app (registered on import by labbook.bench.suites).

The provenance view on a long history: a sample with 400 preparations, a tip with 2,040
conditioning events over two mounts, 10 channels with 20,000 readings each and 3,300 datasets
sharing the sample and the tip. Two datasets are traced: a typical one (3 preparations since
the last cleaning, 40 conditionings since the mount; the goal of issue 6 applies to it) and a
worst case (100 preparations, 540 conditionings: the answer itself is 30 times longer). The
floors are measured in the same run: the plain file detail (``GET /files/{id}``) and
``GET /me``. The query counts show the fixed bound: the same for both.
"""

from __future__ import annotations

import hashlib
import statistics
import time
from collections.abc import Callable
from datetime import UTC, datetime, timedelta

from django.contrib.auth import get_user_model
from django.db import connection
from django.test import Client
from django.test.utils import CaptureQueriesContext

from labbook.bench import Figure, benchmark

PREPARATIONS = 400
# Preparations 0-299 clean the surface every fourth time (a working week); 300-399 never do, so
# a dataset after them has 100 preparations since its last cleaning (the worst case).
WORST_SINCE_CLEANING = 100
MINUTES_PER_PREPARATION = 10
OLD_MOUNT_EVENTS = 1500  # conditioning during an earlier mount: not part of today's state
TYPICAL_EVENTS = 40  # since the current mount, before the typical dataset
WORST_EVENTS = 540  # since the current mount, before the worst-case dataset
CHANNELS = 10
READINGS_PER_CHANNEL = 20_000
FILES = 3_000
GOAL_P95_MS = 50.0  # issue 6


def _p95_ms(func: Callable[[], object], *, repeat: int = 200, warmup: int = 20) -> float:
    for _ in range(warmup):
        func()
    samples = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        samples.append((time.perf_counter() - start) * 1000)
    return statistics.quantiles(samples, n=20)[-1]


def _history(member) -> tuple[int, int]:
    """The data set; returns the ids of the typical and the worst-case dataset."""
    from labbook.datafiles import lineage
    from labbook.datafiles.actions import replace_coverages, store_lineage
    from labbook.datafiles.models import AcquiredFile
    from labbook.instruments.actions import create_channel, create_instrument
    from labbook.instruments.readings import insert_readings
    from labbook.logbook.actions import start_session
    from labbook.samples.actions import create_sample, record_preparation, transfer_sample
    from labbook.tips.actions import create_tip, mount_tip, record_conditioning

    t0 = datetime(2026, 1, 5, 8, 0, tzinfo=UTC)

    def minute(m: float) -> datetime:
        return t0 + timedelta(minutes=m)

    instrument = create_instrument(name="bench-prov", description="", actor=member)
    sample = create_sample(name="bench Cu(111)", substrate="Cu(111)", actor=member)
    transfer_sample(sample, location="microscope_stage", at=t0, instrument=instrument, actor=member)
    clean = [
        {
            "kind": "sputter",
            "energy_ev": "1 keV",
            "current_a": "2 uA",
            "beam_area_cm2": 1,
            "duration_s": "15 min",
            "pressure_mbar": "5e-6 mbar",
        },
        {"kind": "anneal", "temperature_k": "780 K", "duration_s": "10 min", "cleans": True},
    ]
    dose = [
        {"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.05, "duration_s": "1 min"},
        {"kind": "dose", "gas": "CO", "pressure_mbar": 1e-8, "duration_s": 20},
        {"kind": "anneal", "temperature_k": "300 K", "duration_s": "1 min"},
    ]
    last_weekly = PREPARATIONS - WORST_SINCE_CLEANING
    preparations = []
    for i in range(PREPARATIONS):
        cleans = i == last_weekly or (i < last_weekly and i % 4 == 0)
        preparations.append(
            record_preparation(
                sample=sample,
                instrument=instrument,
                started_at=minute(MINUTES_PER_PREPARATION * i),
                steps=clean if cleans else dose,
                actor=member,
            )
        )
    end = MINUTES_PER_PREPARATION * PREPARATIONS
    tip = create_tip(name="bench W", material="W", origin="etched", actor=member)
    old_until = end / 2
    mount_tip(tip, instrument, start=t0, end=minute(old_until), actor=member)
    mount_tip(tip, instrument, start=minute(old_until), actor=member)
    typical_at = MINUTES_PER_PREPARATION * 290 + 5  # after preparation 290, 2 after a cleaning
    for i in range(OLD_MOUNT_EVENTS):
        at = old_until * (i + 0.5) / OLD_MOUNT_EVENTS
        record_conditioning(
            tip, kind="pulse", at=minute(at), params={"voltage_v": "3 V"}, actor=member
        )
    for i in range(TYPICAL_EVENTS):
        at = old_until + (typical_at - 30 - old_until) * (i + 0.5) / TYPICAL_EVENTS
        record_conditioning(
            tip, kind="pulse", at=minute(at), params={"voltage_v": "3 V"}, actor=member
        )
    for i in range(WORST_EVENTS - TYPICAL_EVENTS):
        at = typical_at + 60 + (end - typical_at - 60) * (i + 0.5) / WORST_EVENTS
        record_conditioning(
            tip,
            kind="field_emission",
            at=minute(at),
            params={"voltage_v": "60 V", "current_a": "1 uA"},
            actor=member,
        )
    start_session(instrument, start=t0, end=minute(end + 2 * 24 * 60), actor=member)
    span = minute(end + 24 * 60) - t0
    for c in range(CHANNELS):
        pressure = c < 4
        channel = create_channel(
            instrument,
            name=f"gauge {c}",
            quantity="pressure" if pressure else "temperature",
            unit="mbar" if pressure else "K",
            expected_interval_s=60,
            actor=member,
        )
        step = span / READINGS_PER_CHANNEL
        rows = [
            (channel.pk, t0 + i * step, 1e-10 if pressure else 4.3)
            for i in range(READINGS_PER_CHANNEL)
        ]
        for k in range(0, len(rows), 5000):
            insert_readings(rows[k : k + 5000])

    rows = []

    def add_file(name: str, at: datetime, preparation) -> None:
        digest = hashlib.sha256(name.encode()).hexdigest()
        rows.append(
            AcquiredFile(
                sha256=digest,
                size_bytes=1000,
                storage_name=f"acquired/{digest}",
                original_name=name,
                status="ready",
                kind="topograph",
                acquired_at=at,
                instrument=instrument,
                sample=sample,
                preparation=preparation,
                tip=tip,
                operator=member,
                processed_at=at,
                reader="npy/1.0",
            )
        )

    # 300 datasets after preparation 290, then 3,000 after the last one.
    for i in range(300):
        add_file(
            f"typical-{i}.npy", minute(MINUTES_PER_PREPARATION * 290 + i / 30), preparations[290]
        )
    for i in range(FILES):
        add_file(f"late-{i}.npy", minute(end + i / 6), preparations[-1])
    AcquiredFile.objects.bulk_create(rows, batch_size=500)
    targets = []
    for name in ("typical-150.npy", f"late-{FILES // 2}.npy"):
        target = AcquiredFile.objects.get(original_name=name)
        found = lineage.resolve(
            acquired_at=target.acquired_at, metadata={}, instrument=instrument, uploaded_by=member
        )
        store_lineage(target, found)
        target.save()
        replace_coverages(target, found.coverages)
        targets.append(target.pk)
    return targets[0], targets[1]


@benchmark("provenance")
def provenance() -> list[Figure]:
    from labbook.accounts.actions import mint_token, set_role

    member, _ = get_user_model().objects.get_or_create(
        username="bench-prov", defaults={"first_name": "Bench"}
    )
    set_role(member, "manager")  # a manager sets up the instrument
    typical_id, worst_id = _history(member)
    _, raw = mint_token(member, label="bench")
    client = Client()
    headers = {"Authorization": f"Bearer {raw}"}

    def view(file_id: int) -> Callable[[], None]:
        url = f"/api/v1/files/{file_id}/provenance"

        def get() -> None:
            assert client.get(url, headers=headers).status_code == 200

        return get

    def detail():
        assert client.get(f"/api/v1/files/{typical_id}", headers=headers).status_code == 200

    def me():
        assert client.get("/api/v1/me", headers=headers).status_code == 200

    from labbook.datafiles.models import AcquiredFile
    from labbook.provenance import queries

    counts = {}
    for file_id in (typical_id, worst_id):
        # Read the count at once: the capture reads the connection's query log lazily, and
        # the next request empties that log.
        with CaptureQueriesContext(connection) as captured:
            queries.as_json(queries.provenance_of(file_id))
        counts[file_id] = len(captured)
    with CaptureQueriesContext(connection) as baseline:
        list(AcquiredFile.objects.prefetch_related("coverages").get(pk=typical_id).coverages.all())
    detail_queries = len(baseline)
    assert counts[typical_id] > 0, "the query capture read nothing"

    typical = client.get(f"/api/v1/files/{typical_id}/provenance", headers=headers).json()
    worst = client.get(f"/api/v1/files/{worst_id}/provenance", headers=headers).json()
    assert len(typical["preparations"]) == 3, len(typical["preparations"])
    assert len(typical["tip_state"]["conditioning"]) == TYPICAL_EVENTS
    assert typical["neighbours"]["surface_state"]["count"] == 299
    assert len(worst["preparations"]) == WORST_SINCE_CLEANING
    assert len(worst["tip_state"]["conditioning"]) == WORST_EVENTS
    assert worst["neighbours"]["tip_state"]["count"] == FILES - 1

    me_ms = _p95_ms(me)
    detail_ms = _p95_ms(detail)
    typical_ms = _p95_ms(view(typical_id))
    worst_ms = _p95_ms(view(worst_id), repeat=100)
    return [
        Figure(
            "GET /files/{id}/provenance, 3 preparations and 40 conditionings since "
            "(of 400 and 2,040), p95",
            typical_ms,
            "ms",
            detail_ms,
            "GET /files/{id}: the plain file detail, p95",
            goal_value=GOAL_P95_MS,
        ),
        Figure(
            "GET /files/{id}/provenance, typical, against GET /me, p95",
            typical_ms,
            "ms",
            me_ms,
            "GET /api/v1/me, p95",
        ),
        Figure(
            f"GET /files/{{id}}/provenance, worst case: {WORST_SINCE_CLEANING} preparations and "
            f"{WORST_EVENTS} conditionings since, p95",
            worst_ms,
            "ms",
            detail_ms,
            "GET /files/{id}: the plain file detail, p95",
        ),
        Figure(
            "provenance_of + as_json, database queries, typical",
            float(counts[typical_id]),
            "queries",
            float(detail_queries),
            "the file detail's file + coverages",
        ),
        Figure(
            "provenance_of + as_json, database queries, worst case",
            float(counts[worst_id]),
            "queries",
            float(detail_queries),
            "the file detail's file + coverages",
        ),
    ]
