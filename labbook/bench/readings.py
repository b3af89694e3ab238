"""Readings at scale (PostgreSQL): 10 million readings over 20 channels, then ingest through
POST /readings against a raw COPY into the same indexed table, the state query, the state
endpoint end to end, and one channel's day for a plot against the covering-index floor."""

from __future__ import annotations

import io
import json
import os
import random
import statistics
import time
from datetime import UTC, datetime, timedelta

import numpy as np
from django.contrib.auth import get_user_model
from django.db import connection
from django.test import Client

from labbook.bench import Figure, benchmark

CHANNELS = 20
TOTAL_READINGS = int(os.environ.get("LABBOOK_BENCH_READINGS", 10_000_000))
INTERVAL_S = 10
POST_BATCHES = int(os.environ.get("LABBOOK_BENCH_POST_BATCHES", 200))
BATCH = 1000


def _p95(samples: list[float]) -> float:
    return statistics.quantiles(samples, n=20)[-1]


def _copy_text(
    channel_ids, start: datetime, count: int, interval_s: int, offset_s: float = 0.0
) -> str:
    """COPY text for ``count`` instants per channel, from ``start`` (numpy, no Python loop)."""
    base = np.datetime64(start.replace(tzinfo=None), "ms") + np.timedelta64(
        int(offset_s * 1000), "ms"
    )
    steps = (np.arange(count, dtype=np.int64) * interval_s * 1000).astype("timedelta64[ms]")
    stamps = np.datetime_as_string(base + steps, unit="ms")
    stamps = np.char.add(stamps, "+00")
    lines = []
    rng = np.random.default_rng(7)
    for channel_id in channel_ids:
        values = 1e-10 * (1 + 0.1 * rng.standard_normal(count))
        column = np.char.add(np.char.add(f"{channel_id}\t", stamps), "\t")
        lines.append("\n".join(np.char.add(column, values.astype(str)).tolist()))
    return "\n".join(lines) + "\n"


def _copy(text: str) -> float:
    """Seconds to COPY ``text`` into the readings table (the floor any ingest path has)."""
    connection.ensure_connection()
    raw = connection.connection
    started = time.perf_counter()
    with (
        raw.cursor() as cursor,
        cursor.copy("COPY instruments_reading (channel_id, t, value) FROM STDIN") as copy,
    ):
        stream = io.StringIO(text)
        while chunk := stream.read(1 << 20):
            copy.write(chunk)
    return time.perf_counter() - started


@benchmark("readings")
def readings() -> list[Figure]:
    if connection.vendor != "postgresql":
        print("readings: skipped, needs PostgreSQL (set DATABASE_URL)")
        return []
    from labbook.accounts.actions import mint_token, set_role
    from labbook.instruments.actions import create_channel, create_instrument
    from labbook.instruments.models import Instrument
    from labbook.instruments.queries import _LATEST_PER_CHANNEL_SQL, readings_between

    manager, _ = get_user_model().objects.get_or_create(username="bench-manager")
    set_role(manager, "manager")
    instrument = Instrument.objects.filter(name="BENCH-1").first() or create_instrument(
        name="BENCH-1", actor=manager
    )
    channels = [
        create_channel(
            instrument, name=f"gauge {i:02d}", quantity="pressure", unit="mbar", actor=manager
        )
        for i in range(CHANNELS)
    ]
    ids = [c.pk for c in channels]
    per_channel = TOTAL_READINGS // CHANNELS
    end = datetime.now(UTC).replace(microsecond=0) - timedelta(days=1)
    start = end - timedelta(seconds=per_channel * INTERVAL_S)
    print(
        f"readings: loading {per_channel * CHANNELS:,} readings over {CHANNELS} channels "
        f"from {start:%Y-%m-%d} to {end:%Y-%m-%d} …",
        flush=True,
    )

    load_seconds = 0.0
    chunk = 100_000
    for first in range(0, per_channel, chunk):
        n = min(chunk, per_channel - first)
        text = _copy_text(ids, start + timedelta(seconds=first * INTERVAL_S), n, INTERVAL_S)
        load_seconds += _copy(text)
    with connection.cursor() as cursor:
        cursor.execute("VACUUM (ANALYZE) instruments_reading")
    print(
        f"readings: loaded at {per_channel * CHANNELS / load_seconds:,.0f} rows/s (COPY)",
        flush=True,
    )

    # Ingest: the same number of new rows by COPY and by POST /readings, into the full table.
    post_rows = POST_BATCHES * BATCH
    per_channel_new = post_rows // CHANNELS
    copy_text = _copy_text(ids, start, per_channel_new, INTERVAL_S, offset_s=3.0)
    copy_rate = per_channel_new * CHANNELS / _copy(copy_text)

    _, token = mint_token(manager, label="bench")
    client = Client()
    headers = {"Authorization": f"Bearer {token}"}
    bodies = []
    t0 = start + timedelta(seconds=6)
    rows = [
        {
            "channel": cid,
            "t": (t0 + timedelta(seconds=i * INTERVAL_S)).isoformat(),
            "value": 1.1e-10,
        }
        for i in range(per_channel_new)
        for cid in ids
    ]
    for first in range(0, len(rows), BATCH):
        bodies.append(json.dumps(rows[first : first + BATCH]))
    started = time.perf_counter()
    for body in bodies:
        response = client.post(
            "/api/v1/readings", body, content_type="application/json", headers=headers
        )
        assert response.status_code == 200 and response.json()["inserted"] == BATCH, (
            response.content
        )
    post_rate = len(rows) / (time.perf_counter() - started)

    # State at random instants: the SQL alone, and the endpoint end to end.
    rng = random.Random(11)
    span = (end - start).total_seconds()
    instants = [start + timedelta(seconds=rng.uniform(0, span)) for _ in range(400)]
    sql_ms = []
    with connection.cursor() as cursor:
        for at in instants:
            began = time.perf_counter()
            cursor.execute(_LATEST_PER_CHANNEL_SQL, [at, instrument.pk])
            assert len(cursor.fetchall()) == CHANNELS
            sql_ms.append((time.perf_counter() - began) * 1000)
        cursor.execute(
            "EXPLAIN (ANALYZE, BUFFERS, COSTS OFF) " + _LATEST_PER_CHANNEL_SQL,
            [instants[0], instrument.pk],
        )
        plan = "\n".join(row[0] for row in cursor.fetchall())
    print("readings: EXPLAIN of the state query at a random instant:\n" + plan, flush=True)
    select_one_ms = []
    with connection.cursor() as cursor:
        for _ in range(400):
            began = time.perf_counter()
            cursor.execute("SELECT 1")
            cursor.fetchone()
            select_one_ms.append((time.perf_counter() - began) * 1000)

    endpoint_ms, health_ms = [], []
    for at in instants[:200]:
        began = time.perf_counter()
        response = client.get(
            f"/api/v1/instruments/{instrument.pk}/state", {"at": at.isoformat()}, headers=headers
        )
        endpoint_ms.append((time.perf_counter() - began) * 1000)
        assert response.status_code == 200
        began = time.perf_counter()
        client.get("/healthz")
        health_ms.append((time.perf_counter() - began) * 1000)

    # One channel's day for a plot: through the query function vs the raw covering-index read.
    day_ms, floor_ms = [], []
    channel = channels[3]
    for _ in range(30):
        day_start = start + timedelta(seconds=rng.uniform(0, span - 86400))
        day_end = day_start + timedelta(days=1)
        began = time.perf_counter()
        values = readings_between(channel, day_start, day_end)
        day_ms.append((time.perf_counter() - began) * 1000)
        assert len(values) >= 8000
        began = time.perf_counter()
        with connection.connection.cursor() as raw:
            raw.execute(
                "SELECT t, value FROM instruments_reading"
                " WHERE channel_id = %s AND t >= %s AND t <= %s ORDER BY t",
                [channel.pk, day_start, day_end],
            )
            raw.fetchall()
        floor_ms.append((time.perf_counter() - began) * 1000)

    return [
        Figure(
            "POST /readings in 1,000-row batches (rows/s, inverted)",
            1 / post_rate * 1e6,
            "µs/row",
            1 / copy_rate * 1e6,
            f"COPY into the same table ({copy_rate:,.0f} rows/s)",
            goal_ratio=10.0,
            goal_value=50.0,
        ),
        Figure(
            "state query SQL at a random t, p95",
            _p95(sql_ms),
            "ms",
            _p95(select_one_ms),
            "SELECT 1 round trip, p95",
            goal_value=1.0,
        ),
        Figure(
            "GET /instruments/{id}/state end to end, p95",
            _p95(endpoint_ms),
            "ms",
            _p95(health_ms),
            "GET /healthz, p95",
            goal_value=15.0,
        ),
        Figure(
            "one channel's day (8,640 readings) for a plot, median",
            statistics.median(day_ms),
            "ms",
            statistics.median(floor_ms),
            "raw covering-index read, median",
            goal_ratio=2.0,
        ),
    ]
