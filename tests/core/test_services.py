"""In CI the real services are used: PostgreSQL for the database, a real Celery worker on Redis.

Outside CI these tests skip when the services are not configured; in CI (CI=true) they fail.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import uuid
from pathlib import Path
from urllib.parse import quote

import pytest
from django.conf import settings
from django.db import connection

from labbook.celery import app

ROOT = Path(__file__).resolve().parents[2]
IN_CI = os.environ.get("CI", "").lower() == "true"


def _needs(condition: bool, reason: str) -> None:
    if not condition:
        if IN_CI:
            pytest.fail(f"CI must run with {reason}")
        pytest.skip(f"needs {reason}")


@pytest.mark.django_db
def test_database_is_postgresql_in_ci():
    _needs(connection.vendor == "postgresql", "DATABASE_URL pointing at PostgreSQL")
    with connection.cursor() as cursor:
        cursor.execute("SHOW server_version_num")
        assert int(cursor.fetchone()[0]) >= 140000


def _url_of_test_database() -> str:
    db = connection.settings_dict
    credentials = quote(db["USER"] or "")
    if db["PASSWORD"]:
        credentials += ":" + quote(db["PASSWORD"])
    host = db["HOST"] or "localhost"
    port = f":{db['PORT']}" if db["PORT"] else ""
    return f"postgresql://{credentials}@{host}{port}/{db['NAME']}"


@pytest.fixture
def real_worker():
    """A Celery worker process on its own queue, reading the test database."""
    _needs(bool(settings.CELERY_BROKER_URL), "CELERY_BROKER_URL or REDIS_URL set")
    _needs(
        connection.vendor == "postgresql",
        "PostgreSQL (a worker process cannot see SQLite's test database)",
    )
    queue = f"labbook-test-{uuid.uuid4().hex[:8]}"
    env = {
        **os.environ,
        "DATABASE_URL": _url_of_test_database(),
        "CELERY_TASK_DEFAULT_QUEUE": queue,
    }
    worker = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "celery",
            "-A",
            "labbook",
            "worker",
            "--pool",
            "solo",
            "--queues",
            queue,
            "--hostname",
            f"{queue}@%h",
            "--without-mingle",
            "--without-gossip",
            "--loglevel",
            "WARNING",
        ],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    previous = (app.conf.task_always_eager, app.conf.task_default_queue)
    app.conf.task_always_eager = False
    app.conf.task_default_queue = queue
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            if worker.poll() is not None:
                pytest.fail(f"the worker exited: {worker.stdout.read()}")
            if app.control.ping(destination=[f"{queue}@{os.uname().nodename}"], timeout=0.5):
                break
        else:
            pytest.fail("the worker did not answer within 60 s")
        yield queue
    finally:
        app.conf.task_always_eager, app.conf.task_default_queue = previous
        worker.terminate()
        try:
            worker.wait(timeout=20)
        except subprocess.TimeoutExpired:
            worker.kill()


@pytest.mark.worker
@pytest.mark.django_db(transaction=True)
def test_a_real_worker_runs_a_task_and_returns_its_result(real_worker):
    result = app.send_task("labbook.core.tasks.worker_probe", queue=real_worker)
    assert result.get(timeout=30) == {"database": "postgresql", "jobs": 0}


@pytest.mark.worker
@pytest.mark.django_db(transaction=True)
def test_a_recorded_job_is_run_by_the_real_worker(real_worker, member):
    from labbook.core import jobs
    from labbook.core.models import Job

    job = jobs.enqueue("worker_round_trip", actor=member)  # autocommit: queued at once
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        job.refresh_from_db()
        if job.state == Job.State.DONE:
            break
        time.sleep(0.1)
    assert job.state == Job.State.DONE, job.error
    assert job.result["job"] == job.pk and job.result["pid"] != os.getpid()


@pytest.mark.worker
@pytest.mark.django_db(transaction=True)
def test_healthz_counts_the_live_worker(real_worker, client):
    from labbook.core import health

    health._worker_cache.clear()
    response = client.get("/healthz")
    assert response.status_code == 200
    body = response.json()
    assert (body["broker"], body["workers"], body["status"]) == ("ok", "ok", "ok")
    assert body["worker_count"] >= 1


@pytest.mark.worker
@pytest.mark.django_db(transaction=True)
def test_a_real_worker_processes_an_uploaded_file(real_worker, member, client):
    """Upload through the API; the worker process reads, measures and thumbnails it."""
    import io

    import numpy as np

    from labbook.accounts.actions import mint_token
    from labbook.datafiles.models import AcquiredFile

    buffer = io.BytesIO()
    x = np.arange(64) / 64
    np.save(buffer, np.tile(1e-10 * np.sin(2 * np.pi * 4 * x), (64, 1)).astype(np.float32))
    upload = io.BytesIO(buffer.getvalue())
    upload.name = "worker-grating.npy"
    _, raw = mint_token(member)
    response = client.post(
        "/api/v1/files",
        {"file": upload, "metadata": '{"kind": "topograph"}'},
        headers={"Authorization": f"Bearer {raw}"},
    )
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    deadline = time.monotonic() + 60
    while record.status == "pending" and time.monotonic() < deadline:
        time.sleep(0.2)
        record.refresh_from_db()
    assert record.status == "ready", record.error
    assert record.thumbnail_name and record.stats["rq"] > 0
