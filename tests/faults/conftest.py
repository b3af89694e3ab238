"""What the fault tests share: a private Redis they may stop, real worker processes they may
kill, the test database's URL for server processes, and a small synthetic topograph.

The machine's own Redis and PostgreSQL cluster are never stopped: a fault test starts its own
redis-server on a free loopback port, and cuts PostgreSQL connections with
pg_terminate_backend on its own test database only.
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pytest
from django.db import connection

ROOT = Path(__file__).resolve().parents[2]
WORKER = Path(__file__).with_name("worker.py")
IN_CI = os.environ.get("CI", "").lower() == "true"
# Loopback only: no proxy may stand between a test and the processes it starts.
PLAIN_ENV = {k: v for k, v in os.environ.items() if "proxy" not in k.lower()}


def needs(condition: bool, reason: str) -> None:
    """Skip outside CI when a service is missing; in CI (CI=true) that is a failure."""
    if not condition:
        if IN_CI:
            pytest.fail(f"CI must run with {reason}")
        pytest.skip(f"needs {reason}")


def needs_postgres() -> None:
    needs(
        connection.vendor == "postgresql",
        "DATABASE_URL pointing at PostgreSQL (server and worker processes share the test database)",
    )


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def wait_for(check: Callable[[], object], timeout: float, what: str, interval: float = 0.1):
    deadline = time.monotonic() + timeout
    while True:
        value = check()
        if value:
            return value
        if time.monotonic() > deadline:
            pytest.fail(f"{what} did not happen within {timeout:g} s")
        time.sleep(interval)


def url_of_test_database(**options: str) -> str:
    db = connection.settings_dict
    if connection.vendor == "sqlite":
        # The test database is a file (settings: DATABASES TEST NAME); four slashes = absolute.
        return f"sqlite:///{Path(db['NAME']).resolve()}"
    credentials = quote(db["USER"] or "")
    if db["PASSWORD"]:
        credentials += ":" + quote(db["PASSWORD"])
    host = db["HOST"] or "localhost"
    port = f":{db['PORT']}" if db["PORT"] else ""
    query = "&".join(f"{k}={quote(v)}" for k, v in options.items())
    return f"postgresql://{credentials}@{host}{port}/{db['NAME']}" + (f"?{query}" if query else "")


def topograph(seed: int, n: int = 64, name: str | None = None) -> io.BytesIO:
    """A small synthetic topograph (.npy): a 4-period corrugation of 0.1 nm and noise."""
    rng = np.random.default_rng(seed)
    x = np.arange(n) / n
    z = 1e-10 * np.sin(2 * np.pi * 4 * x)[None, :] + 2e-12 * rng.standard_normal((n, n))
    buffer = io.BytesIO()
    np.save(buffer, z.astype(np.float32))
    upload = io.BytesIO(buffer.getvalue())
    upload.name = name or f"fault-{seed}.npy"
    return upload


def signal_group(process: subprocess.Popen, sig: int) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, sig)


def stop(process: subprocess.Popen, *, timeout: float = 15) -> None:
    signal_group(process, signal.SIGTERM)
    try:
        process.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        signal_group(process, signal.SIGKILL)
        process.wait(timeout=10)


class RedisServer:
    """A redis-server of the test's own on a free port, without persistence: stopping it
    loses whatever it held, as a crashed or restarted broker does."""

    def __init__(self, work: Path):
        self.port = free_port()
        self.work = work
        self.process: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> None:
        binary = shutil.which("redis-server")
        needs(binary is not None, "redis-server installed (the fault tests start their own)")
        self.process = subprocess.Popen(
            [binary, "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
             "--appendonly", "no", "--dir", str(self.work)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )  # fmt: skip
        wait_for(self.answers, 10, f"redis-server on port {self.port}")

    def answers(self) -> bool:
        try:
            with socket.create_connection(("127.0.0.1", self.port), timeout=0.5) as sock:
                sock.sendall(b"PING\r\n")
                return sock.recv(16).startswith(b"+PONG")
        except OSError:
            return False

    def kill(self) -> None:
        if self.process is not None:
            signal_group(self.process, signal.SIGKILL)
            self.process.wait(timeout=10)
            self.process = None


@pytest.fixture
def private_redis(tmp_path):
    server = RedisServer(tmp_path)
    server.start()
    try:
        yield server
    finally:
        server.kill()


@pytest.fixture
def broker(private_redis, settings):
    """This process's Celery app talking to the private Redis on a queue of the test's own;
    tasks are sent, not run eagerly."""
    from labbook.celery import app

    queue = f"labbook-fault-{uuid.uuid4().hex[:8]}"
    saved = {
        key: app.conf[key]
        for key in ("broker_url", "result_backend", "task_default_queue", "task_always_eager")
    }

    def reset_connections() -> None:
        # The producer pool and result backend are made on first use; drop them so the
        # next message goes to the URL now configured.
        if app._pool is not None:
            app._pool.force_close_all()
            app._pool = None
        app.amqp._producer_pool = None
        if hasattr(app._local, "backend"):
            del app._local.backend

    app.conf.update(
        broker_url=private_redis.url,
        result_backend=private_redis.url,
        task_default_queue=queue,
        task_always_eager=False,
    )
    reset_connections()
    try:
        yield queue
    finally:
        app.conf.update(saved)
        reset_connections()


class Workers:
    """Real Celery worker processes (tests/faults/worker.py), each in its own session."""

    def __init__(self, queue: str, broker_url: str, work: Path):
        self.queue = queue
        self.broker_url = broker_url
        self.work = work
        self.running: list[subprocess.Popen] = []
        self.count = 0

    def start(self, *, wait: bool = True, **faults: str) -> subprocess.Popen:
        from django.conf import settings

        from labbook.celery import app

        self.count += 1
        hostname = f"{self.queue}-{self.count}@{socket.gethostname()}"
        env = {
            **PLAIN_ENV,
            "DATABASE_URL": url_of_test_database(),
            "CELERY_BROKER_URL": self.broker_url,
            "CELERY_RESULT_BACKEND": self.broker_url,
            "CELERY_TASK_DEFAULT_QUEUE": self.queue,
            # The same files and secret key as this process: the worker reads what it stored.
            "LABBOOK_DATA_DIR": str(settings.DATA_DIR),
            "LABBOOK_FILES_DIR": str(settings.MEDIA_ROOT),
            "DB_CONN_MAX_AGE": "0",
            "FAULT_MARKER_DIR": str(self.work),
            **faults,
        }
        log = open(self.work / f"worker-{self.count}.log", "w")  # noqa: SIM115
        process = subprocess.Popen(
            [sys.executable, str(WORKER), "--queues", self.queue, "--hostname", hostname],
            cwd=ROOT,
            env=env,
            stdout=log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        log.close()
        process.hostname = hostname  # type: ignore[attr-defined]
        self.running.append(process)
        if wait:
            deadline = time.monotonic() + 60
            while not app.control.ping(destination=[hostname], timeout=0.5):
                if process.poll() is not None:
                    pytest.fail(f"the worker exited: {self.log(self.count)}")
                if time.monotonic() > deadline:
                    pytest.fail(f"the worker did not answer within 60 s: {self.log(self.count)}")
        return process

    def log(self, number: int) -> str:
        return (self.work / f"worker-{number}.log").read_text()[-4000:]

    def kill(self, process: subprocess.Popen) -> None:
        signal_group(process, signal.SIGKILL)
        process.wait(timeout=10)

    def stop_all(self) -> None:
        for process in self.running:
            if process.poll() is None:
                stop(process)


@pytest.fixture
def workers(broker, private_redis, tmp_path):
    needs_postgres()
    pool = Workers(broker, private_redis.url, tmp_path)
    try:
        yield pool
    finally:
        pool.stop_all()


class Server:
    """gunicorn serving labbook on a free loopback port against the test database."""

    def __init__(self, work: Path, *, workers: int = 2, **env: str):
        self.port = free_port()
        self.work = work
        self.workers = workers
        self.env = env
        self.process: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self) -> None:
        import urllib.error
        import urllib.request

        from django.conf import settings

        env = {
            k: v
            for k, v in PLAIN_ENV.items()
            if k not in ("CELERY_BROKER_URL", "REDIS_URL", "CELERY_RESULT_BACKEND")
        }
        env.update(
            {
                "DATABASE_URL": url_of_test_database(),
                "LABBOOK_DATA_DIR": str(settings.DATA_DIR),
                "LABBOOK_FILES_DIR": str(settings.MEDIA_ROOT),
                **self.env,
            }
        )
        log = open(self.work / "server.log", "w")  # noqa: SIM115
        self.process = subprocess.Popen(
            [sys.executable, "-m", "gunicorn", "labbook.wsgi", "--bind",
             f"127.0.0.1:{self.port}", "--workers", str(self.workers), "--graceful-timeout",
             "3", "--log-level", "warning"],
            cwd=ROOT, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
        )  # fmt: skip
        log.close()
        opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))

        def answers() -> bool:
            if self.process.poll() is not None:
                pytest.fail(f"the server exited: {self.log()}")
            try:
                opener.open(f"{self.url}/api/v1/readings", timeout=2)
            except urllib.error.HTTPError:
                return True  # any HTTP answer (401 here): it serves
            except OSError:
                return False
            return True

        wait_for(answers, 30, "the server answering")

    def log(self) -> str:
        return (self.work / "server.log").read_text()[-4000:]

    def stop(self) -> None:
        if self.process is not None:
            stop(self.process)
            self.process = None


@pytest.fixture
def fault_report():
    """``fault_report(fault, tries=, survived=, lost=)`` records a scenario's outcome for the
    table ``make faults`` prints (a JSON line in $FAULT_REPORT; nothing when it is unset)."""
    import json

    def record(fault: str, *, tries: int, survived: int, lost: int, **details) -> None:
        path = os.environ.get("FAULT_REPORT")
        if path:
            with open(path, "a") as handle:
                line = {"fault": fault, "tries": tries, "survived": survived, "lost": lost}
                handle.write(json.dumps({**line, **details}, default=str) + "\n")

    return record
