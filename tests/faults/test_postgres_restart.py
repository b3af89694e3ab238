"""Fault: the PostgreSQL server itself restarts under load, once cleanly (``pg_ctl restart -m
fast``) and once as a crash (``pg_ctl stop -m immediate``, then start: WAL replay).

A private cluster (tests/faults/pgcluster.py) holds the database, so the machine's own is
never stopped. gunicorn serves it with persistent connections (60 s, health checks on, as in
production) while four clients post reading batches and preparations and retry what was
refused. Every answer is a success or a clear 503 (JSON error, Retry-After), never a 500 or a
dropped connection; the server's connections recover by themselves; /healthz says 503 while
the database is down and 200 after; every acknowledged batch is wholly stored, no batch is
partly stored or doubled, every preparation has all its steps or is absent.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import threading
import time
from collections import Counter
from datetime import UTC, datetime, timedelta

import psycopg
import pytest
import requests
from django.conf import settings

from labbook.instruments.models import Reading
from labbook.samples.models import Preparation, PreparationStep

from . import pgcluster
from .conftest import PLAIN_ENV, ROOT, Server, needs, wait_for

pytestmark = pytest.mark.postgres

FAULT = "PostgreSQL restarted under load"
DATABASE = "labbook_pgrestart"
CLIENTS = 4
BATCH = 200
WRITES_TO_RECOVER = 8  # successes after a restart that show every client writes again
GIVE_UP_S = 25  # a client refused this long in a row: the server did not recover
T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
STEPS = [
    {"kind": "sputter", "gas": "Ar", "energy_ev": "1 keV", "current_a": "1 uA",
     "beam_area_cm2": 1, "duration_s": "10 min", "pressure_mbar": "5e-6 mbar"},
    {"kind": "anneal", "temperature_k": "800 K", "duration_s": "15 min", "method": "resistive",
     "cleans": True},
    {"kind": "anneal", "temperature_k": "600 K", "duration_s": "5 min", "method": "resistive"},
]  # fmt: skip

# Run in a fresh process against the private cluster: migrate it, then the lab the clients
# write to. The pytest process's own database stays the normal test database.
SETUP = """
import json
import django

django.setup()
from django.contrib.auth import get_user_model
from django.core.management import call_command

call_command("migrate", interactive=False, verbosity=0)
from labbook.accounts.actions import mint_token, set_role
from labbook.instruments.actions import create_channel, create_instrument
from labbook.samples.actions import create_sample

users = get_user_model().objects
manager = users.create_user(username="mara", password="mara-pw-Lattice-7")
set_role(manager, "manager")
member = users.create_user(username="bo", password="bo-pw-Lattice-7")
set_role(member, "member")
instrument = create_instrument(name="LTM-T", description="restart test", actor=manager)
gauge = create_channel(instrument, name="prep gauge", quantity="pressure", unit="mbar",
                       gas="N2", actor=manager)
crystal = create_sample(name="Cu(111) restart crystal", substrate="Cu(111)", actor=member)
_, token = mint_token(member)
print("LAB " + json.dumps({"instrument": instrument.pk, "gauge": gauge.pk,
                           "crystal": crystal.pk, "token": token}))
"""


def server_env(database_url: str) -> dict[str, str]:
    """What Server (conftest) gives gunicorn, for the setup process: the same files and secret."""
    env = {
        k: v
        for k, v in PLAIN_ENV.items()
        if k not in ("CELERY_BROKER_URL", "REDIS_URL", "CELERY_RESULT_BACKEND")
    }
    env.update(
        DATABASE_URL=database_url,
        DJANGO_SETTINGS_MODULE="labbook.settings",
        LABBOOK_DATA_DIR=str(settings.DATA_DIR),
        LABBOOK_FILES_DIR=str(settings.MEDIA_ROOT),
        DB_CONN_MAX_AGE="0",
    )
    return env


@pytest.fixture
def private_postgres():
    reason = pgcluster.missing()
    needs(reason is None, reason or "")
    cluster = pgcluster.PrivatePostgres()
    try:
        cluster.start()
        cluster.create_database(DATABASE)
        yield cluster
    finally:
        cluster.destroy()


@pytest.fixture
def lab(private_postgres, tmp_path):
    """gunicorn on the private cluster, and the ids and token of the lab set up in it."""
    url = private_postgres.url(DATABASE)
    began = time.monotonic()
    setup = subprocess.Popen(
        [sys.executable, "-c", SETUP],
        cwd=ROOT,
        env=server_env(url),
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    # Persistent connections (60 s) as in production, so a restart lands on connections the
    # workers hold and must notice are dead.
    server = Server(tmp_path, workers=2, DB_CONN_MAX_AGE="60", DATABASE_URL=url)
    try:
        # gunicorn starts while the database is migrated: its start needs no table.
        server.start()
        output, _ = setup.communicate(timeout=120)
        found = re.search(r"^LAB (.*)$", output, re.MULTILINE)
        assert setup.returncode == 0 and found, f"setting up the private database: {output}"
        ids = json.loads(found.group(1))
        ids["url"] = url
        ids["setup_s"] = round(time.monotonic() - began, 1)
        yield server, ids
    finally:
        if setup.poll() is None:
            setup.kill()
            setup.wait(timeout=10)
        server.stop()


def test_clients_ride_out_a_real_postgres_restart_and_crash(
    private_postgres, lab, fault_report, request
):
    cluster = private_postgres
    web, ids = lab
    stop = threading.Event()
    lock = threading.Lock()
    answers: Counter = Counter()
    by_phase: dict[str, Counter] = {}
    phase = ["warm-up"]
    successes = [0]
    retries = [0]
    dropped: list[str] = []
    unclear: list[str] = []
    tried_batches: list[int] = []
    acknowledged_batches: list[int] = []
    tried_preparations: list[str] = []
    acknowledged_preparations: list[str] = []
    answered_late: dict[str, int] = {}
    health: list[tuple[str, int, dict]] = []

    def count(status: int) -> None:
        with lock:
            answers[status] += 1
            by_phase.setdefault(phase[0], Counter())[status] += 1
            if 200 <= status < 300:
                successes[0] += 1

    def post(session: requests.Session, path: str, **kwargs) -> requests.Response | None:
        """Post until answered, as a client honouring Retry-After does (the wait is capped
        at 0.2 s to keep the test short); the same body each time, so a retry is idempotent."""
        refused_since = None
        attempt = 0
        while True:
            if attempt:
                with lock:
                    retries[0] += 1
            attempt += 1
            try:
                response = session.post(f"{web.url}/api/v1{path}", timeout=30, **kwargs)
            except requests.RequestException as exc:
                # A client cannot tell a dropped connection from a lost success: none may happen.
                with lock:
                    dropped.append(f"{phase[0]}: {path}: {exc!r}"[:300])
                response = None
            else:
                count(response.status_code)
                response.retried = attempt > 1
                if response.status_code != 503:
                    return response
                check_refusal(response)
            refused_since = refused_since or time.monotonic()
            if time.monotonic() - refused_since > GIVE_UP_S:
                with lock:
                    unclear.append(f"{path} refused for {GIVE_UP_S} s: the server did not recover")
                return None
            retry_after = response.headers.get("Retry-After", "1") if response else "1"
            time.sleep(min(0.2, float(retry_after) if retry_after.isdigit() else 1))

    def check_refusal(response: requests.Response) -> None:
        problems = []
        if not response.headers.get("Content-Type", "").startswith("application/json"):
            problems.append(f"not JSON: {response.headers.get('Content-Type')!r}")
        try:
            body = response.json()
        except ValueError:
            body = {}
        if not isinstance(body.get("detail"), str) or "database" not in body["detail"]:
            problems.append(f"no clear reason: {response.text[:200]!r}")
        if not response.headers.get("Retry-After", "").isdigit():
            problems.append(f"no Retry-After: {dict(response.headers)}")
        if problems:
            with lock:
                unclear.append(f"503 {path_of(response)}: {'; '.join(problems)}")

    def path_of(response: requests.Response) -> str:
        return response.request.path_url if response.request else "?"

    def client(index: int) -> None:
        session = requests.Session()
        session.trust_env = False
        session.headers["Authorization"] = f"Bearer {ids['token']}"
        n = 0
        while not stop.is_set():
            n += 1
            # Thirty days of instants a client: batches never overlap.
            batch = index * (30 * 86400 // BATCH) + n
            start = T0 + timedelta(seconds=batch * BATCH)
            rows = [
                {"channel": ids["gauge"], "t": (start + timedelta(seconds=i)).isoformat(),
                 "value": 1e-10 + i * 1e-13}
                for i in range(BATCH)
            ]  # fmt: skip
            with lock:
                tried_batches.append(batch)
            response = post(session, "/readings", json=rows)
            if response is None:
                return
            if response.status_code == 200 and response.json()["accepted"] == BATCH:
                with lock:
                    acknowledged_batches.append(batch)
            else:
                with lock:
                    unclear.append(f"readings: {response.status_code} {response.text[:300]}")
            note = f"restart-prep-{index}-{n}"
            with lock:
                tried_preparations.append(note)
            response = post(
                session,
                "/preparations",
                json={"sample": ids["crystal"], "instrument": ids["instrument"],
                      "started_at": (T0 + timedelta(minutes=batch)).isoformat(),
                      "steps": STEPS, "notes": note},
            )  # fmt: skip
            if response is None:
                return
            if response.status_code == 201:
                with lock:
                    acknowledged_preparations.append(note)
            elif response.status_code == 422 and response.retried:
                # Stored, and its answer lost with the connection: the retry is told it
                # exists, by its number (checked below).
                existing = re.search(r"already has a preparation at this time \(#(\d+)\)",
                                     response.text)  # fmt: skip
                with lock:
                    if existing:
                        acknowledged_preparations.append(note)
                        answered_late[note] = int(existing.group(1))
                    else:
                        unclear.append(f"preparation: 422 {response.text[:300]}")
            else:
                with lock:
                    unclear.append(f"preparation: {response.status_code} {response.text[:300]}")

    probe = requests.Session()
    probe.trust_env = False

    def healthz() -> tuple[int, dict]:
        try:
            response = probe.get(f"{web.url}/healthz", timeout=10)
        except requests.RequestException as exc:
            health.append((phase[0], 0, {"error": repr(exc)}))
            return 0, {}
        body = response.json() if response.headers.get("Content-Type") == "application/json" else {}
        health.append((phase[0], response.status_code, body))
        return response.status_code, body

    def writes_resume(what: str) -> None:
        with lock:
            mark = successes[0]
        wait_for(lambda: successes[0] >= mark + WRITES_TO_RECOVER, GIVE_UP_S, what, 0.05)

    assert healthz()[0] == 200, health
    load_began = time.monotonic()
    threads = [threading.Thread(target=client, args=(i,), daemon=True) for i in range(CLIENTS)]
    for thread in threads:
        thread.start()
    try:
        writes_resume("writes before any restart")
        phase[0] = "fast restart"
        began = time.monotonic()
        cluster.restart()
        restart_s = time.monotonic() - began
        writes_resume("writes after the fast restart")
        assert healthz()[0] == 200, health[-3:]

        phase[0] = "crash restart"
        cluster.crash()
        status, body = healthz()
        assert (status, body.get("database")) == (503, "down"), health[-1]
        time.sleep(1.5)  # clients keep posting into the outage, and are refused
        status, body = healthz()
        assert (status, body.get("database")) == (503, "down"), health[-1]
        began = time.monotonic()
        cluster.start()
        wait_for(lambda: healthz()[0] == 200, 15, "/healthz 200 after the crash restart")
        recovery_s = time.monotonic() - began
        writes_resume("writes after the crash restart")
    finally:
        phase[0] = "after"
        stop.set()
        for thread in threads:
            thread.join(timeout=GIVE_UP_S + 35)
    stuck = sum(thread.is_alive() for thread in threads)
    load_s = time.monotonic() - load_began

    # What the database holds, read from the private cluster.
    reading, preparation, step = (m._meta.db_table for m in (Reading, Preparation, PreparationStep))
    with psycopg.connect(ids["url"], connect_timeout=10) as conn:
        per_batch = {
            batch: (rows, distinct)
            for batch, rows, distinct in conn.execute(
                f"SELECT floor(extract(epoch FROM t - %s) / %s)::bigint, count(*), "  # noqa: S608
                f"count(DISTINCT t) FROM {reading} WHERE channel_id = %s GROUP BY 1",
                [T0, BATCH, ids["gauge"]],
            ).fetchall()
        }
        stored = conn.execute(
            f"SELECT p.id, p.notes, count(s.id) FROM {preparation} p "  # noqa: S608
            f"LEFT JOIN {step} s ON s.preparation_id = p.id WHERE p.sample_id = %s "
            "GROUP BY p.id, p.notes",
            [ids["crystal"]],
        ).fetchall()

    complete = {b for b, (rows, distinct) in per_batch.items() if rows == distinct == BATCH}
    partial = {b: rows for b, (rows, _) in per_batch.items() if rows != BATCH}
    doubled_readings = sum(rows - distinct for rows, distinct in per_batch.values())
    notes = Counter(note for _, note, _ in stored)
    whole = {note for _, note, steps in stored if steps == len(STEPS)}
    short = {note: steps for _, note, steps in stored if steps != len(STEPS)}
    doubled = {note: n for note, n in notes.items() if n > 1}
    tries = len(tried_batches) + len(tried_preparations)
    survived = len(complete & set(tried_batches)) + len(
        {note for note in whole if notes[note] == 1} & set(tried_preparations)
    )
    fault_report(
        FAULT,
        tries=tries,
        survived=survived,
        lost=tries - survived,
        test=request.node.nodeid,
        answers=dict(sorted(answers.items())),
        by_phase={name: dict(sorted(c.items())) for name, c in by_phase.items()},
        retries=retries[0],
        dropped=len(dropped),
        partial=len(partial) + len(short),
        setup_s=ids["setup_s"],
        load_s=round(load_s, 1),
        note=f"fast restart + crash; answers {dict(sorted(answers.items()))}, "
        f"{retries[0]} retries, {len(dropped)} dropped",
    )

    assert stuck == 0, f"{stuck} clients still waiting for an answer"
    assert not dropped, dropped[:5]
    assert not unclear, unclear[:5]
    # Every answer was a success or a clear 503, never a 500.
    assert set(answers) <= {200, 201, 422, 503}, answers
    assert answers[422] == len(answered_late)  # only "it is already stored" after a 503
    assert by_phase.get("crash restart", Counter())[503] >= 1, by_phase
    assert {status for _, status, _ in health} <= {200, 503}, health
    assert health[-1][1] == 200, health[-3:]

    # All or nothing, and everything acknowledged is there, once.
    assert not partial, f"batches partly stored (batch: rows): {partial}"
    assert doubled_readings == 0
    assert set(per_batch) == complete == set(acknowledged_batches) == set(tried_batches)
    assert not short, f"preparations missing steps (note: steps): {short}"
    assert not doubled, f"a retried preparation was stored twice: {doubled}"
    assert set(notes) == set(acknowledged_preparations) == set(tried_preparations)
    by_id = {pk: note for pk, note, _ in stored}
    for note, number in answered_late.items():
        assert by_id.get(number) == note
    print(
        f"\n{FAULT}: {tries} tries, {survived} survived; answers {dict(answers)} "
        f"by phase {by_phase}; {retries[0]} retries; restart {restart_s:.1f} s, "
        f"back {recovery_s:.1f} s after the crash start; setup {ids['setup_s']} s, "
        f"load {load_s:.1f} s"
    )
