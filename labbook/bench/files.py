"""Acquired files: hashing a stored file against hashlib on the same bytes in memory, the whole
ingestion of a 512² topograph against read + hash + PNG of its thumbnail, and search over a
million datasets (PostgreSQL) with its EXPLAIN."""

from __future__ import annotations

import hashlib
import io
import json
import os
import random
import statistics
import tempfile
import time
from datetime import UTC, datetime, timedelta

import numpy as np
from django.contrib.auth import get_user_model
from django.db import DatabaseError, connection, transaction
from django.test import Client
from django.test.utils import override_settings
from PIL import Image

from labbook.bench import Figure, benchmark, p50_ms

SEARCH_ROWS = int(os.environ.get("LABBOOK_BENCH_FILES", 1_000_000))


def _p95(samples: list[float]) -> float:
    return statistics.quantiles(samples, n=20)[-1]


def _npy(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=False)
    return buffer.getvalue()


def _topograph(seed: int, n: int = 512) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:n, 0:n] / n
    lattice = 2e-11 * (np.cos(2 * np.pi * 40 * x) + np.cos(2 * np.pi * 40 * (x / 2 + y * 0.866)))
    return (lattice + 3e-10 * x + 1e-11 * rng.standard_normal((n, n))).astype(np.float32)


@benchmark("files")
def files() -> list[Figure]:
    from labbook.accounts.actions import mint_token, set_role
    from labbook.datafiles.actions import ingest
    from labbook.datafiles.models import AcquiredFile
    from labbook.datafiles.storage import hash_stream
    from labbook.science.thumbnails import thumbnail_png

    figures: list[Figure] = []
    member, _ = get_user_model().objects.get_or_create(username="bench-files")
    set_role(member, "manager")
    media = tempfile.mkdtemp(prefix="labbook-bench-files-")

    # 1. Hashing a stored 64 MiB file in 1 MiB chunks vs hashlib over the same bytes in memory.
    data = os.urandom(64 << 20)
    path = os.path.join(media, "blob")
    with open(path, "wb") as handle:
        handle.write(data)

    def hash_memory():
        hashlib.sha256(data).hexdigest()

    def hash_file():
        with open(path, "rb") as handle:
            hash_stream(handle)

    memory_ms = p50_ms(hash_memory, repeat=9, warmup=2)
    file_ms = p50_ms(hash_file, repeat=9, warmup=2)
    figures.append(
        Figure(
            "SHA-256 of a stored 64 MiB file (time, inverted rate)",
            file_ms,
            "ms",
            memory_ms,
            f"hashlib over the same bytes in memory ({64 / 1.048576 / memory_ms * 1000:,.0f} MB/s)",
            goal_ratio=1 / 0.85,
        )
    )
    os.unlink(path)

    # 2. Ingest + statistics + thumbnail of a 512² float32 topograph, end to end in-process
    # (store, read, measure, thumbnail, lineage, rows), against the floor of read + hash + PNG.
    topographs = [_npy(_topograph(seed)) for seed in range(40)]
    floor_path = os.path.join(media, "floor.npy")
    with open(floor_path, "wb") as handle:
        handle.write(topographs[0])
    small = (np.random.default_rng(1).random((256, 256)) * 255).astype(np.uint8)

    def floor():
        with open(floor_path, "rb") as handle:
            raw = handle.read()
        hashlib.sha256(raw).hexdigest()
        out = io.BytesIO()
        Image.fromarray(small, mode="L").save(out, format="PNG", compress_level=1)

    floor_ms = p50_ms(floor, repeat=40, warmup=5)
    ingest_ms: list[float] = []
    with override_settings(MEDIA_ROOT=media, CELERY_TASK_ALWAYS_EAGER=True):
        from labbook.celery import app

        eager = app.conf.task_always_eager
        app.conf.task_always_eager = True
        try:
            for index, blob in enumerate(topographs):
                metadata = {
                    "kind": "topograph",
                    "bias_v": 0.5,
                    "setpoint_a": 1e-10,
                    "scan_size_m": [2e-8, 2e-8],
                    "acquired_at": datetime.now(UTC).isoformat(),
                }
                started = time.perf_counter()
                with transaction.atomic():
                    result = ingest(
                        io.BytesIO(blob), f"t{index}.npy", metadata=metadata, actor=member
                    )
                ingest_ms.append((time.perf_counter() - started) * 1000)
                assert AcquiredFile.objects.get(pk=result.file.pk).status == "ready"
        finally:
            app.conf.task_always_eager = eager
    image = _topograph(0)
    thumb_ms = p50_ms(lambda: thumbnail_png(image), repeat=20)
    ingest_median = statistics.median(ingest_ms[5:])
    figures.append(
        Figure(
            "ingest + statistics + thumbnail, 512² float32, median",
            ingest_median,
            "ms",
            floor_ms,
            "read + SHA-256 + PNG of a 256² thumbnail",
            goal_ratio=3.0,
        )
    )
    straight_ms = _straight_line_ms([_npy(_topograph(seed)) for seed in range(100, 140)], media)
    figures.append(
        Figure(
            "  the same against its stages in a straight line, median",
            ingest_median,
            "ms",
            straight_ms,
            "store + read + SHA-256 + statistics + thumbnail + 1 INSERT, no ORM nor task",
        )
    )
    figures.append(
        Figure(
            "  of which the thumbnail alone, p50",
            thumb_ms,
            "ms",
            floor_ms,
            "the same floor",
        )
    )

    # 3. Search over a million datasets: bias + coverage ranges, newest first, 50 rows. The SQL
    # timed is the page of ids that GET /files and the search page ask for.
    if connection.vendor != "postgresql":
        print("files: search benchmark skipped, needs PostgreSQL (set DATABASE_URL)")
        return figures
    _fill_datasets(SEARCH_ROWS)
    from labbook.datafiles.queries import FileSearch, page_ids_sql

    rng = random.Random(5)
    criteria = []
    for _ in range(300):
        bias = rng.uniform(-1, 0.9)
        coverage = rng.uniform(0, 1.8)
        criteria.append(
            FileSearch(
                bias_min=bias,
                bias_max=bias + 0.1,
                coverage_min=coverage,
                coverage_max=coverage + 0.2,
            )
        )
    sql_ms = []
    with connection.cursor() as cursor:
        for item in criteria:
            sql, params = page_ids_sql(item, offset=0, limit=50)
            started = time.perf_counter()
            cursor.execute(sql, params)
            cursor.fetchall()
            sql_ms.append((time.perf_counter() - started) * 1000)
        sql, params = page_ids_sql(criteria[0], offset=0, limit=50)
        cursor.execute("EXPLAIN (ANALYZE, BUFFERS, COSTS OFF) " + sql, params)
        print("files: EXPLAIN of a search (bias and coverage ranges, newest first, 50 rows):")
        print("\n".join(row[0] for row in cursor.fetchall()), flush=True)
    _, token = mint_token(member, label="bench")
    client = Client()
    headers = {"Authorization": f"Bearer {token}"}
    api_ms, health_ms = [], []
    for item in criteria[:150]:
        params = {
            "bias_min": item.bias_min,
            "bias_max": item.bias_max,
            "coverage_min": item.coverage_min,
            "coverage_max": item.coverage_max,
            "limit": 50,
        }
        started = time.perf_counter()
        response = client.get("/api/v1/files", params, headers=headers)
        api_ms.append((time.perf_counter() - started) * 1000)
        assert response.status_code == 200
        started = time.perf_counter()
        client.get("/healthz")
        health_ms.append((time.perf_counter() - started) * 1000)
    with connection.cursor() as cursor:
        select_one = []
        for _ in range(300):
            started = time.perf_counter()
            cursor.execute("SELECT 1")
            cursor.fetchone()
            select_one.append((time.perf_counter() - started) * 1000)
    figures.append(
        Figure(
            f"search SQL over {SEARCH_ROWS:,} datasets (bias + coverage, newest 50), p95",
            _p95(sql_ms),
            "ms",
            _p95(select_one),
            "SELECT 1 round trip, p95",
            goal_value=2.0,
        )
    )
    figures.append(
        Figure(
            "GET /files with the same filters end to end, p95",
            _p95(api_ms),
            "ms",
            _p95(health_ms),
            "GET /healthz, p95",
            goal_value=20.0,
        )
    )
    return figures


def _straight_line_ms(blobs: list[bytes], media: str) -> float:
    """Median time of what an ingest must do, each stage at its floor and one after another:
    write the new bytes to a file, read and hash them, the statistics bundle (with the FFT
    period) and the thumbnail, the thumbnail written, one INSERT committed. No ORM, no
    history row, no task: what is left of the ingest's time beyond this is those."""
    from labbook.datafiles.tasks import _jsonable  # what the ingest stores the stats with
    from labbook.science.images import image_statistics
    from labbook.science.thumbnails import thumbnail_png

    folder = os.path.join(media, "straight")
    os.makedirs(folder)
    with connection.cursor() as cursor:
        cursor.execute("CREATE TABLE bench_straight_line (sha256 text PRIMARY KEY, stats text)")
    spent = []
    for index, blob in enumerate(blobs):
        started = time.perf_counter()
        path = os.path.join(folder, f"{index}.npy")
        with open(path, "wb") as handle:
            handle.write(blob)
        with open(path, "rb") as handle:
            raw = handle.read()
        sha256 = hashlib.sha256(raw).hexdigest()
        heights = np.load(io.BytesIO(raw), allow_pickle=False)
        pixel = 2e-8 / heights.shape[1]
        found = image_statistics(heights, dx=pixel, dy=pixel, periodicity=True)
        with open(path + ".png", "wb") as handle:
            handle.write(thumbnail_png(heights, dx=pixel, dy=pixel))
        with connection.cursor() as cursor:
            cursor.execute(
                "INSERT INTO bench_straight_line VALUES (%s, %s)",
                [sha256, json.dumps(_jsonable(found))],
            )
        spent.append((time.perf_counter() - started) * 1000)
    with connection.cursor() as cursor:
        cursor.execute("DROP TABLE bench_straight_line")
    return statistics.median(spent[5:])


def _fill_datasets(count: int) -> None:
    """COPY ``count`` ready datasets with spread bias, setpoint, coverage and times."""
    rng = np.random.default_rng(3)
    now = datetime.now(UTC)
    columns = (
        "sha256, size_bytes, storage_name, original_name, source, source_path, uploaded_by_id, "
        "status, error, reader, attempts, kind, acquired_at, bias_v, setpoint_a, temperature_k, "
        "channel_name, metadata, given_metadata, raw_header, coverage_ml, lineage, stats, "
        "thumbnail_name, created_at, updated_at"
    )
    print(f"files: loading {count:,} datasets …", flush=True)
    connection.ensure_connection()
    raw = connection.connection
    chunk = 100_000
    stamp = now.isoformat()
    for first in range(0, count, chunk):
        n = min(chunk, count - first)
        bias = rng.uniform(-1, 1, n)
        setpoint = 10 ** rng.uniform(-11, -9, n)
        coverage = rng.uniform(0, 2, n)
        seconds = rng.uniform(0, 5 * 365 * 86400, n)
        lines = []
        for i in range(n):
            sha = hashlib.sha256(f"bench-{first + i}".encode()).hexdigest()
            when = (now - timedelta(seconds=float(seconds[i]))).isoformat()
            lines.append(
                f"{sha}\t1024\tacquired/{sha}\tb{first + i}.npy\tbench\t\t\\N\tready\t\tbench\t1\t"
                "topograph\t"
                f"{when}\t{bias[i]:.6f}\t{setpoint[i]:.6e}\t4.5\tz\t{{}}\t{{}}\t{{}}\t{coverage[i]:.6f}\t"
                f"{{}}\t{{}}\t\t{stamp}\t{stamp}"
            )
        with (
            raw.cursor() as cursor,
            cursor.copy(f"COPY datafiles_acquiredfile ({columns}) FROM STDIN") as copy,
        ):
            copy.write("\n".join(lines) + "\n")
    with connection.cursor() as cursor:
        cursor.execute("VACUUM (ANALYZE) datafiles_acquiredfile")
        # Write the loaded pages out now: left to the spread checkpoint, ~0.5 GB goes to disk
        # over the next minutes, during the timed searches, on the same two cores.
        try:
            cursor.execute("CHECKPOINT")  # autocommit, like the VACUUM: a refusal breaks nothing
        except DatabaseError as exc:  # not a superuser nor pg_checkpoint: measured as it is
            print(f"files: no CHECKPOINT after the load ({exc}); searches may meet its writes")
