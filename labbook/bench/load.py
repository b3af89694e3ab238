"""``make load``: 20 clients for 2 minutes against gunicorn, PostgreSQL, Redis and two workers.

Loopback only, bounded in time and in count, and it stops by itself. It creates its own
PostgreSQL database (``labbook_load``, dropped again at the end), migrates it, seeds a lab
(a manager, a member with a token and a password, an instrument with channels, a sample and a
tip), starts gunicorn and two Celery workers on a queue of its own, then runs the clients:
reading batches (``POST /api/v1/readings``), file uploads (``POST /api/v1/files``, small
synthetic topographs as .npy and .tiff), searches (``GET /api/v1/files?bias_min=…``) and page
views (``/`` and ``/datasets/`` with a login session). Before the load each kind is timed once
alone, one request at a time: that is the floor the loaded figures are a ratio of.

At the end it waits (bounded) until every uploaded file is processed and says how many reached
``ready``, prints the table and writes ``var/bench/load.json``. Whatever happens, the processes
it started are stopped (each in its own process group) and its database is dropped.

Environment: ``LOAD_SECONDS`` (120), ``LOAD_CLIENTS`` (20), ``LOAD_MAX_REQUESTS`` (100000),
``LOAD_WEB_WORKERS`` (4), ``LOAD_THINK_SECONDS`` (0.5: each client's mean pause between
requests; 0 = flat out), ``LOAD_DRAIN_SECONDS`` (300), ``LOAD_ADMIN_DATABASE_URL``
(``postgresql://postgres@127.0.0.1:5432/postgres``), ``LOAD_DATABASE`` (``labbook_load``),
``REDIS_URL`` (``redis://127.0.0.1:6379/0``), ``LOAD_KEEP`` (keep the database, for a look).
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import random
import re
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections import defaultdict
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

ROOT = Path(__file__).resolve().parents[2]
PYTHON = sys.executable

#: The share of each kind of request in the mix (common practice for a lab day: loggers post
#: all the time, people look and search, files arrive in bursts).
MIX = {"readings": 0.35, "search": 0.30, "page": 0.20, "upload": 0.15}
READINGS_PER_BATCH = 100
SEARCH_P95_GOAL_MS = 100.0
PASSWORD = "load-member-pw-Lattice-7"  # noqa: S105 - a throwaway database's user
INSTRUMENT = "LTM-L"


def _env_int(name: str, default: int) -> int:
    raw = os.environ.get(name, "").strip()
    return int(raw) if raw else default


@dataclass
class Config:
    seconds: int = field(default_factory=lambda: _env_int("LOAD_SECONDS", 120))
    clients: int = field(default_factory=lambda: _env_int("LOAD_CLIENTS", 20))
    max_requests: int = field(default_factory=lambda: _env_int("LOAD_MAX_REQUESTS", 100_000))
    web_workers: int = field(default_factory=lambda: _env_int("LOAD_WEB_WORKERS", 4))
    # Mean pause of a client between its requests (exponential): a person reads a page, a
    # logger waits for its next batch. 0 drives the server flat out (a saturation test).
    think_s: float = field(
        default_factory=lambda: float(os.environ.get("LOAD_THINK_SECONDS", "") or 0.5)
    )
    drain_seconds: int = field(default_factory=lambda: _env_int("LOAD_DRAIN_SECONDS", 300))
    admin_url: str = field(
        default_factory=lambda: os.environ.get(
            "LOAD_ADMIN_DATABASE_URL", "postgresql://postgres@127.0.0.1:5432/postgres"
        )
    )
    database: str = field(default_factory=lambda: os.environ.get("LOAD_DATABASE", "labbook_load"))
    redis_url: str = field(
        default_factory=lambda: (
            os.environ.get("REDIS_URL")
            or os.environ.get("CELERY_BROKER_URL")
            or "redis://127.0.0.1:6379/0"
        )
    )
    keep: bool = field(default_factory=lambda: bool(os.environ.get("LOAD_KEEP")))

    def __post_init__(self) -> None:
        if not re.fullmatch(r"[a-z_][a-z0-9_]{0,62}", self.database):
            raise SystemExit(
                f"LOAD_DATABASE {self.database!r}: use lower-case letters, _ and digits"
            )
        for url in (self.admin_url, self.redis_url):
            host = urlsplit(url).hostname or "localhost"
            if host not in ("127.0.0.1", "localhost", "::1"):
                raise SystemExit(f"the load test runs on loopback only; {url!r} is not")
        self.seconds = max(1, self.seconds)
        self.clients = max(1, self.clients)

    @property
    def database_url(self) -> str:
        parts = urlsplit(self.admin_url)
        return urlunsplit(parts._replace(path="/" + self.database))


# --- the services -----------------------------------------------------------------------------


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


class Processes:
    """Every process the run starts, each in its own session, so stopping one stops its
    children too (gunicorn's workers, a worker's pool)."""

    def __init__(self) -> None:
        self.started: list[tuple[str, subprocess.Popen]] = []

    def start(self, name: str, command: list[str], env: dict, log_path: Path) -> subprocess.Popen:
        log_file = open(log_path, "w")  # noqa: SIM115 - closed when the process is stopped
        process = subprocess.Popen(
            command,
            cwd=ROOT,
            env=env,
            stdout=log_file,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        process.log_file = log_file  # type: ignore[attr-defined]
        self.started.append((name, process))
        return process

    def stop_all(self) -> None:
        for _, process in self.started:
            _signal_group(process, signal.SIGTERM)
        deadline = time.monotonic() + 15
        for _, process in self.started:
            try:
                process.wait(timeout=max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                _signal_group(process, signal.SIGKILL)
                process.wait(timeout=10)
            # A worker's pool or gunicorn's workers may outlive their parent by a moment.
            _signal_group(process, signal.SIGKILL)
            process.log_file.close()  # type: ignore[attr-defined]
        self.started.clear()


def _signal_group(process: subprocess.Popen, sig: int) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, sig)


def _admin_execute(config: Config, *statements: str) -> None:
    import psycopg

    with psycopg.connect(config.admin_url, autocommit=True, connect_timeout=10) as conn:
        for statement in statements:
            conn.execute(statement)


def _create_database(config: Config) -> None:
    name = config.database
    # WITH (FORCE) (PostgreSQL 13+) ends a previous, interrupted run's connections.
    _admin_execute(
        config, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)', f'CREATE DATABASE "{name}"'
    )


def _drop_database(config: Config) -> None:
    _admin_execute(config, f'DROP DATABASE IF EXISTS "{config.database}" WITH (FORCE)')


def _run(command: list[str], env: dict, what: str) -> None:
    done = subprocess.run(command, cwd=ROOT, env=env, capture_output=True, text=True, timeout=600)
    if done.returncode != 0:
        raise RuntimeError(f"{what} failed:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}")


def _seed() -> dict:
    """The lab the clients work in. Runs in this process, against the load database."""
    from django.contrib.auth import get_user_model

    from labbook.accounts.actions import mint_token, set_role
    from labbook.instruments.actions import create_channel, create_instrument
    from labbook.samples.actions import create_sample
    from labbook.tips.actions import create_tip

    users = get_user_model()
    manager = users.objects.create_user("load-manager", password=PASSWORD + "-m")
    set_role(manager, "manager")
    member = users.objects.create_user("load-member", password=PASSWORD)
    set_role(member, "member")
    instrument = create_instrument(
        name=INSTRUMENT, description="load-test microscope", actor=manager
    )
    channels = [
        create_channel(instrument, name="prep gauge", quantity="pressure", unit="mbar", gas="N2",
                       actor=manager),
        create_channel(instrument, name="main gauge", quantity="pressure", unit="mbar", gas="N2",
                       actor=manager),
        create_channel(instrument, name="STM head", quantity="temperature", unit="K",
                       actor=manager),
        create_channel(instrument, name="LHe level", quantity="cryogen_level", unit="L",
                       actor=manager),
    ]  # fmt: skip
    sample = create_sample(name="Cu(111) load crystal", substrate="Cu(111)", actor=member)
    tip = create_tip(name="W load tip", material="W", actor=member)
    _, token = mint_token(member, label="load test")
    return {
        "token": token,
        "username": member.username,
        "channels": [c.pk for c in channels],
        "instrument": instrument.pk,
        "sample": sample.pk,
        "tip": tip.pk,
    }


# --- the clients ------------------------------------------------------------------------------


@dataclass
class Sample:
    kind: str
    ms: float
    ok: bool
    error: str = ""


class Client:
    """One lab user or logger: a keep-alive HTTP session, a token and a login session."""

    def __init__(self, index: int, base: str, lab: dict, seed: int):
        import requests

        self.index = index
        self.base = base
        self.lab = lab
        self.random = random.Random(seed)
        self.api = requests.Session()
        self.api.trust_env = False  # loopback: no proxy between client and server
        self.api.headers["Authorization"] = f"Bearer {lab['token']}"
        self.browser = requests.Session()
        self.browser.trust_env = False
        self.uploaded: list[int] = []
        self.sequence = 0
        # Each client logs its own instants (a month ago, one second apart) so batches insert.
        self.t0 = datetime.now(UTC) - timedelta(days=30) + timedelta(days=index / 10)

    def login(self) -> None:
        page = self.browser.get(f"{self.base}/login/", timeout=30)
        page.raise_for_status()
        match = re.search(r'name="csrfmiddlewaretoken" value="([^"]+)"', page.text)
        if not match:
            raise RuntimeError("the login page has no CSRF token")
        answer = self.browser.post(
            f"{self.base}/login/",
            data={
                "username": self.lab["username"],
                "password": PASSWORD,
                "csrfmiddlewaretoken": match.group(1),
            },
            headers={"Referer": f"{self.base}/login/"},
            allow_redirects=False,
            timeout=30,
        )
        if answer.status_code != 302:
            raise RuntimeError(f"login answered {answer.status_code}, not a redirect")

    # The four kinds ---------------------------------------------------------------------
    def readings(self) -> tuple[bool, str]:
        rows = []
        for _ in range(READINGS_PER_BATCH):
            self.sequence += 1
            t = self.t0 + timedelta(seconds=self.sequence)
            channel = self.lab["channels"][self.sequence % len(self.lab["channels"])]
            rows.append({"channel": channel, "t": t.isoformat(), "value": self.random.random()})
        answer = self.api.post(f"{self.base}/api/v1/readings", json=rows, timeout=60)
        if answer.status_code != 200:
            return False, f"readings {answer.status_code}: {answer.text[:200]}"
        body = answer.json()
        if body["accepted"] != len(rows) or body["rejected"]:
            return False, f"readings not all accepted: {str(body)[:200]}"
        return True, ""

    def upload(self) -> tuple[bool, str]:
        name, data, metadata = self._topograph()
        answer = self.api.post(
            f"{self.base}/api/v1/files",
            files={"file": (name, data, "application/octet-stream")},
            data={"metadata": json.dumps(metadata)},
            timeout=60,
        )
        if answer.status_code not in (200, 201):
            return False, f"upload {answer.status_code}: {answer.text[:200]}"
        self.uploaded.append(answer.json()["id"])
        return True, ""

    def search(self) -> tuple[bool, str]:
        low = self.random.uniform(-2.0, 1.0)
        params = {"bias_min": round(low, 3), "bias_max": round(low + 1.0, 3), "limit": 50}
        if self.random.random() < 0.3:
            params["kind"] = "topograph"
        answer = self.api.get(f"{self.base}/api/v1/files", params=params, timeout=60)
        if answer.status_code != 200:
            return False, f"search {answer.status_code}: {answer.text[:200]}"
        if "items" not in answer.json():
            return False, "search answered without items"
        return True, ""

    def page(self) -> tuple[bool, str]:
        path = self.random.choice(["/", "/datasets/"])
        answer = self.browser.get(f"{self.base}{path}", allow_redirects=False, timeout=60)
        if answer.status_code != 200:
            return False, f"page {path} {answer.status_code}"
        return True, ""

    def _topograph(self) -> tuple[str, bytes, dict]:
        """A 64 × 64 synthetic topograph (a corrugation and noise), unique bytes each time."""
        import numpy as np

        n = 64
        x = np.arange(n) / n
        phase = self.random.random() * 2 * np.pi
        rng = np.random.default_rng(self.random.getrandbits(32))
        z = 1e-10 * np.sin(2 * np.pi * 4 * x + phase)[None, :] + 2e-12 * rng.standard_normal((n, n))
        z = z.astype(np.float32)
        metadata = {
            "kind": "topograph",
            "instrument": INSTRUMENT,
            "bias_v": round(self.random.uniform(-2.0, 2.0), 3),
            "setpoint_a": 1e-10,
            "scan_size_m": [2e-8, 2e-8],
            "pixels": [n, n],
            "temperature_k": 4.6,
        }
        buffer = io.BytesIO()
        if self.random.random() < 0.5:
            np.save(buffer, z)
            return f"load-{self.index}-{self.sequence}.npy", buffer.getvalue(), metadata
        import tifffile

        tifffile.imwrite(buffer, z, metadata={"unit": "m", "kind": "topograph"})
        self.sequence += 1
        return f"load-{self.index}-{self.sequence}.tiff", buffer.getvalue(), metadata

    def one(self, kind: str) -> Sample:
        start = time.perf_counter()
        try:
            ok, error = getattr(self, kind)()
        except Exception as exc:  # noqa: BLE001 - a failed request is a figure, not a crash
            ok, error = False, f"{kind}: {type(exc).__name__}: {exc}"[:300]
        return Sample(kind, (time.perf_counter() - start) * 1000, ok, error)

    def pick(self) -> str:
        roll = self.random.random()
        for kind, share in MIX.items():
            roll -= share
            if roll < 0:
                return kind
        return "readings"


def _drive(
    clients: list[Client], seconds: float, max_requests: int, think_s: float
) -> tuple[list[Sample], float]:
    samples: list[Sample] = []
    lock = threading.Lock()
    stop = threading.Event()
    budget = [max_requests]

    def loop(client: Client) -> None:
        while not stop.is_set():
            with lock:
                if budget[0] <= 0:
                    return
                budget[0] -= 1
            sample = client.one(client.pick())
            with lock:
                samples.append(sample)
            if think_s > 0:
                stop.wait(client.random.expovariate(1 / think_s))

    threads = [threading.Thread(target=loop, args=(c,), daemon=True) for c in clients]
    started = time.monotonic()
    for thread in threads:
        thread.start()
    # Bounded twice: the clock and the request budget; each request has its own 60 s timeout.
    while time.monotonic() - started < seconds and any(t.is_alive() for t in threads):
        time.sleep(0.2)
    stop.set()
    for thread in threads:
        thread.join(timeout=90)
    return samples, time.monotonic() - started


def _percentiles(values: list[float]) -> dict[str, float | None]:
    if not values:
        return {"p50": None, "p95": None, "p99": None}
    import numpy as np

    p50, p95, p99 = np.percentile(values, [50, 95, 99])
    return {"p50": float(p50), "p95": float(p95), "p99": float(p99)}


def _floors(client: Client, repeat: int = 15) -> dict[str, float]:
    """Each kind alone, one request at a time, on the same server: the unloaded p50."""
    import statistics

    floors = {}
    for kind in MIX:
        # Warm-up: each gunicorn worker imports numpy, the readers and the templates on first
        # use; that is start-up, not the cost of a request.
        for _ in range(8):
            client.one(kind)
        times = []
        for _ in range(repeat if kind != "upload" else 6):
            sample = client.one(kind)
            if not sample.ok:
                raise RuntimeError(f"the unloaded {kind} request failed: {sample.error}")
            times.append(sample.ms)
        floors[kind] = statistics.median(times)
    return floors


# --- the run ----------------------------------------------------------------------------------


def _wait_until(check, timeout: float, what: str, processes: Processes) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for name, process in processes.started:
            if process.poll() is not None:
                raise RuntimeError(f"{name} exited with {process.returncode}; see its log")
        try:
            if check():
                return
        except Exception:  # noqa: BLE001, S110 - not up yet
            pass
        time.sleep(0.3)
    raise RuntimeError(f"{what} did not come up within {timeout:.0f} s")


def _drain(ids: list[int], timeout: float) -> dict[str, int]:
    from django.db import close_old_connections

    from labbook.datafiles.models import AcquiredFile

    deadline = time.monotonic() + timeout
    counts: dict[str, int] = {}
    while True:
        close_old_connections()
        counts = defaultdict(int)
        for status in AcquiredFile.objects.filter(pk__in=ids).values_list("status", flat=True):
            counts[status] += 1
        counts["missing"] = len(set(ids)) - sum(counts.values())
        if counts.get("pending", 0) == 0 or time.monotonic() > deadline:
            return dict(counts)
        time.sleep(1)


def run(config: Config) -> int:
    run_id = uuid.uuid4().hex[:8]
    queue = f"labbook-load-{run_id}"
    os.environ.update(
        {
            "DATABASE_URL": config.database_url,
            "DB_CONN_MAX_AGE": "0",
            "REDIS_URL": config.redis_url,
            "CELERY_BROKER_URL": config.redis_url,
            "CELERY_TASK_DEFAULT_QUEUE": queue,
            "DJANGO_SETTINGS_MODULE": "labbook.settings",
        }
    )
    import django

    django.setup()
    from django.conf import settings
    from django.db import connections

    from labbook.bench import Figure, write_figures

    work = Path(settings.DATA_DIR) / "load"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    child_env = {k: v for k, v in os.environ.items() if "proxy" not in k.lower()}
    child_env.update(
        {
            "LABBOOK_DATA_DIR": str(work),
            "DB_CONN_MAX_AGE": "60",
            "LOG_LEVEL": "WARNING",
            # The sweep's threshold matters only if a message is lost; the run has no beat.
            "LABBOOK_SWEEP_AFTER_SECONDS": "30",
        }
    )
    processes = Processes()
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    report: dict = {}
    figures: list[Figure] = []
    failed = True
    print(f"load: database {config.database}, queue {queue}, {base}, files in {work}", flush=True)
    try:
        _create_database(config)
        _run([PYTHON, "manage.py", "migrate", "--noinput"], child_env, "migrate")
        _run(
            [PYTHON, "manage.py", "collectstatic", "--noinput", "--verbosity", "0"],
            child_env,
            "collectstatic",
        )
        lab = _seed()
        connections.close_all()

        processes.start(
            "gunicorn",
            [PYTHON, "-m", "gunicorn", "labbook.wsgi", "--bind", f"127.0.0.1:{port}",
             "--workers", str(config.web_workers), "--timeout", "60", "--graceful-timeout", "5",
             "--log-level", "warning"],
            child_env,
            work / "gunicorn.log",
        )  # fmt: skip
        hostnames = []
        for n in (1, 2):
            hostname = f"load{n}-{run_id}@{socket.gethostname()}"
            hostnames.append(hostname)
            processes.start(
                f"worker {n}",
                [PYTHON, "-m", "celery", "-A", "labbook", "worker", "--pool", "solo",
                 "--queues", queue, "--hostname", hostname, "--without-mingle",
                 "--without-gossip", "--loglevel", "WARNING"],
                child_env,
                work / f"worker{n}.log",
            )  # fmt: skip

        import requests

        from labbook.celery import app

        plain = requests.Session()
        plain.trust_env = False
        _wait_until(
            lambda: plain.get(f"{base}/login/", timeout=2).status_code == 200,
            60,
            "gunicorn",
            processes,
        )
        _wait_until(
            lambda: len(app.control.ping(destination=hostnames, timeout=1)) == 2,
            90,
            "the two workers",
            processes,
        )

        clients = [Client(i, base, lab, seed=1000 + i) for i in range(config.clients)]
        for client in clients:
            client.login()
        print("load: measuring each kind alone (the floors)", flush=True)
        floors = _floors(clients[0])
        print(
            f"load: {config.clients} clients for {config.seconds} s, "
            f"{config.think_s:g} s mean pause between requests "
            f"(at most {config.max_requests} requests)",
            flush=True,
        )
        # The machine is shared: its load before the run says what else was competing.
        load_before = list(os.getloadavg())
        samples, elapsed = _drive(clients, config.seconds, config.max_requests, config.think_s)
        uploaded = [i for c in clients for i in c.uploaded]
        print(f"load: waiting (≤ {config.drain_seconds} s) for {len(uploaded)} files", flush=True)
        drain_started = time.monotonic()
        files = _drain(uploaded, config.drain_seconds)
        drain_s = time.monotonic() - drain_started

        by_kind: dict[str, list[Sample]] = defaultdict(list)
        for sample in samples:
            by_kind[sample.kind].append(sample)
        kinds = {}
        for kind in MIX:
            done = by_kind.get(kind, [])
            ok_ms = [s.ms for s in done if s.ok]
            kinds[kind] = {
                "requests": len(done),
                "errors": sum(not s.ok for s in done),
                "per_second": len(done) / elapsed if elapsed else 0.0,
                "floor_p50_ms": floors[kind],
                **{f"{k}_ms": v for k, v in _percentiles(ok_ms).items()},
            }
        errors = [s.error for s in samples if not s.ok]
        total = len(samples)
        report = {
            "config": {
                "seconds": config.seconds,
                "clients": config.clients,
                "think_s": config.think_s,
                "web_workers": config.web_workers,
                "celery_workers": 2,
                "mix": MIX,
                "readings_per_batch": READINGS_PER_BATCH,
                "database": "postgresql",
            },
            "load_average_before": load_before,
            "elapsed_s": elapsed,
            "requests": total,
            "per_second": total / elapsed if elapsed else 0.0,
            "readings_per_second": kinds["readings"]["requests"] * READINGS_PER_BATCH / elapsed,
            "errors": len(errors),
            "error_examples": sorted(set(errors))[:20],
            "kinds": kinds,
            "files": {"uploaded": len(set(uploaded)), **files, "waited_s": drain_s},
        }
        for kind, stats in kinds.items():
            if stats["p95_ms"] is None:
                continue
            figures.append(
                Figure(
                    f"load: {kind} p95 under {config.clients} clients",
                    stats["p95_ms"],
                    "ms",
                    stats["floor_p50_ms"],
                    f"the same {kind} request alone, p50",
                    goal_value=SEARCH_P95_GOAL_MS if kind == "search" else None,
                )
            )
        figures.append(
            Figure(
                "load: failed requests", float(len(errors)), "requests", float(total),
                "requests made", goal_value=0.0,
            )
        )  # fmt: skip
        not_ready = len(set(uploaded)) - files.get("ready", 0)
        figures.append(
            Figure(
                "load: uploaded files not ready after the wait", float(not_ready), "files",
                float(len(set(uploaded))), "files uploaded", goal_value=0.0,
            )
        )  # fmt: skip
        _print(report)
        failed = any(f.met is False for f in figures)
    finally:
        processes.stop_all()
        connections.close_all()
        if not config.keep:
            try:
                _drop_database(config)
            except Exception as exc:  # noqa: BLE001 - reported; the run's outcome stands
                print(f"load: could not drop {config.database}: {exc}", file=sys.stderr)
        try:
            import redis

            redis.Redis.from_url(config.redis_url).delete(queue)
        except Exception:  # noqa: BLE001, S110 - an empty queue left behind costs nothing
            pass
    output = write_figures(Path(settings.DATA_DIR) / "bench" / "load.json", figures, load=report)
    print(f"load: figures written to {output}  (logs in {work})")
    return 1 if failed else 0


def _fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:8.1f}"


def _print(report: dict) -> None:
    print()
    print(f"{'kind':<10} {'requests':>8} {'per s':>7} {'errors':>6} {'alone p50':>10} "
          f"{'p50 ms':>8} {'p95 ms':>8} {'p99 ms':>8}")  # fmt: skip
    for kind, s in report["kinds"].items():
        print(
            f"{kind:<10} {s['requests']:>8} {s['per_second']:>7.1f} {s['errors']:>6} "
            f"{_fmt(s['floor_p50_ms']):>10} {_fmt(s['p50_ms'])} {_fmt(s['p95_ms'])} "
            f"{_fmt(s['p99_ms'])}"
        )
    files = report["files"]
    search_p95 = report["kinds"]["search"]["p95_ms"]
    print(
        f"\n{report['requests']} requests in {report['elapsed_s']:.1f} s "
        f"({report['per_second']:.1f}/s, {report['readings_per_second']:.0f} readings/s), "
        f"{report['errors']} errors; search p95 {_fmt(search_p95).strip()} ms "
        f"(goal ≤ {SEARCH_P95_GOAL_MS:g} ms)"
    )
    print(
        f"files: {files['uploaded']} uploaded, {files.get('ready', 0)} ready, "
        f"{files.get('pending', 0)} pending, {files.get('unreadable', 0)} unreadable "
        f"after {files['waited_s']:.1f} s"
    )
    for example in report["error_examples"][:5]:
        print(f"  error: {example}")


def main() -> int:
    config = Config()

    def stop(signum, frame):  # a SIGTERM unwinds through the finally that stops everything
        raise SystemExit(128 + signum)

    signal.signal(signal.SIGTERM, stop)
    return run(config)


if __name__ == "__main__":
    sys.exit(main())
