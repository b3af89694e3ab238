"""The logger client (labbook/clients/logger.py) against a real labbook server process.

A gunicorn process serves the test database (a file on SQLite, ``test_<name>`` on PostgreSQL);
the client runs as its own process, as it would on a chamber PC. Only loopback addresses.
"""

from __future__ import annotations

import ast
import glob
import http.server
import json
import os
import shutil
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import SimpleNamespace
from urllib.parse import quote

import pytest
from django.db import connection

from labbook.accounts.actions import mint_token
from labbook.clients import logger
from labbook.instruments.actions import create_channel
from labbook.instruments.models import Reading

ROOT = Path(__file__).resolve().parents[2]
CLIENT = ROOT / "labbook" / "clients" / "logger.py"
T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
TORR_IN_MBAR = 101325 / 760 / 100  # 1 Torr = 101325/760 Pa exactly; 1 mbar = 100 Pa

# Loopback only: no proxy may stand between the client and the test server.
CLIENT_ENV = {k: v for k, v in os.environ.items() if "proxy" not in k.lower()}


def iso(t: datetime) -> str:
    return t.isoformat().replace("+00:00", "Z")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _url_of_test_database() -> str:
    db = connection.settings_dict
    if connection.vendor == "sqlite":
        # The test database is a file (settings: DATABASES TEST NAME); four slashes = absolute.
        return f"sqlite:///{Path(db['NAME']).resolve()}"
    credentials = quote(db["USER"] or "")
    if db["PASSWORD"]:
        credentials += ":" + quote(db["PASSWORD"])
    host = db["HOST"] or "localhost"
    port = f":{db['PORT']}" if db["PORT"] else ""
    return f"postgresql://{credentials}@{host}{port}/{db['NAME']}"


_no_proxy = urllib.request.build_opener(urllib.request.ProxyHandler({}))


@contextmanager
def labbook_server(port: int, data_dir: Path):
    """gunicorn serving labbook on 127.0.0.1:port; yields the readings URL."""
    env = {
        **CLIENT_ENV,
        "DATABASE_URL": _url_of_test_database(),
        "LABBOOK_DATA_DIR": str(data_dir),
        # No persistent connections: the test's flush and teardown must not wait on them.
        "DB_CONN_MAX_AGE": "0",
    }
    data_dir.mkdir(parents=True, exist_ok=True)
    log_path = data_dir / "server.log"
    with open(log_path, "w") as log_file:
        server = subprocess.Popen(
            [
                sys.executable, "-m", "gunicorn", "labbook.wsgi",
                "--bind", f"127.0.0.1:{port}", "--workers", "1",
                "--graceful-timeout", "3", "--log-level", "warning",
            ],
            cwd=ROOT,
            env=env,
            stdout=log_file,
            stderr=subprocess.STDOUT,
        )  # fmt: skip
        try:
            deadline = time.monotonic() + 30
            while True:
                if server.poll() is not None:
                    pytest.fail(f"the server exited: {log_path.read_text()}")
                try:
                    _no_proxy.open(f"http://127.0.0.1:{port}/api/v1/readings", timeout=2)
                except urllib.error.HTTPError:
                    break  # any HTTP answer (401 here): it serves
                except OSError:
                    if time.monotonic() > deadline:
                        pytest.fail(
                            f"the server did not answer within 30 s: {log_path.read_text()}"
                        )
                    time.sleep(0.1)
            yield f"http://127.0.0.1:{port}/api/v1/readings"
        finally:
            server.terminate()
            try:
                server.wait(timeout=10)
            except subprocess.TimeoutExpired:
                server.kill()
                server.wait(timeout=10)


@pytest.fixture(scope="module")
def server(django_db_setup, tmp_path_factory):
    with labbook_server(_free_port(), tmp_path_factory.mktemp("server")) as url:
        yield url


@pytest.fixture(scope="module")
def standalone(tmp_path_factory) -> Path:
    """The client as a chamber PC gets it: the one file, copied away from the checkout."""
    folder = tmp_path_factory.mktemp("chamber-pc")
    return Path(shutil.copy(CLIENT, folder / "logger.py"))


@pytest.fixture
def lab(manager, member, instrument, tmp_path):
    gauge = create_channel(
        instrument, name="prep gauge", quantity="pressure", unit="mbar", gas="N2", actor=manager
    )
    head = create_channel(
        instrument, name="STM head", quantity="temperature", unit="K", actor=manager
    )
    _, token = mint_token(member, instrument=instrument, label="chamber PC")
    token_file = tmp_path / "token"
    token_file.write_text(token + "\n")
    token_file.chmod(0o600)
    return SimpleNamespace(
        gauge=gauge, head=head, token=token, token_file=token_file, state=tmp_path / "state"
    )


def run_client(
    *args: str,
    state: Path,
    token_file: Path | None = None,
    stdin: str | None = None,
    script: Path = CLIENT,
    python: str = sys.executable,
    module: bool = False,
    env: dict[str, str] | None = None,
    timeout: float = 60,
) -> SimpleNamespace:
    command = [python, "-m", "labbook.clients.logger"] if module else [python, str(script)]
    command += ["--state-dir", str(state), *args]
    if token_file is not None:
        command += ["--token-file", str(token_file)]
    done = subprocess.run(
        command,
        input=stdin,
        capture_output=True,
        text=True,
        timeout=timeout,
        cwd=ROOT if module else script.parent,
        env=env or CLIENT_ENV,
    )
    lines = done.stdout.strip().splitlines()
    summary = json.loads(lines[-1]) if lines else {}
    return SimpleNamespace(status=done.returncode, summary=summary, stderr=done.stderr)


def stored(channel) -> dict[datetime, float]:
    return dict(Reading.objects.filter(channel=channel).values_list("t", "value"))


def spool_entries(state: Path) -> list[dict]:
    path = state / "spool.jsonl"
    return [json.loads(line) for line in path.read_text().splitlines()] if path.exists() else []


def json_lines(rows) -> str:
    return "".join(json.dumps(row) + "\n" for row in rows)


# --- (1) a CSV export -------------------------------------------------------------------------


@pytest.mark.django_db(transaction=True)
def test_a_wide_csv_export_is_stored_with_its_units_converted(server, lab, standalone, tmp_path):
    # A German-locale export: ';' between cells, decimal commas, local time without a zone.
    export = tmp_path / "export.csv"
    export.write_text(
        "Time;Prep gauge (Torr);STM head;Comment\n"
        "02.03.2026 10:00:00;7,5E-10;4,6;ok\n"
        "02.03.2026 10:00:10;;-268,95 degC;gauge off\n"
        "02.03.2026 10:00:20;1,0E-9;4.7 K;\n",
        encoding="utf-8-sig",  # with the BOM spreadsheet programs write
    )
    result = run_client(
        "--url", server, "--once", "--csv", str(export), "--delimiter", ";", "--decimal-comma",
        "--time-format", "%d.%m.%Y %H:%M:%S", "--time-zone", "Europe/Berlin",
        "--map", f"Prep gauge (Torr)={lab.gauge.pk}:Torr", "--map", f"STM head={lab.head.pk}:K",
        state=lab.state, token_file=lab.token_file, script=standalone,
    )  # fmt: skip
    assert result.status == 0, result.stderr
    assert result.summary["inserted"] == 5 and result.summary["pending_readings"] == 0
    assert "Comment" in result.stderr  # the unmapped column is named as skipped
    gauge = stored(lab.gauge)
    # 10:00 in Berlin in March is 09:00 UTC (CET, +01:00).
    assert gauge == {
        T0: pytest.approx(7.5e-10 * TORR_IN_MBAR, rel=1e-12),
        T0 + timedelta(seconds=20): pytest.approx(1.0e-9 * TORR_IN_MBAR, rel=1e-12),
    }
    head = stored(lab.head)
    assert sorted(head) == [T0 + timedelta(seconds=s) for s in (0, 10, 20)]
    assert [head[t] for t in sorted(head)] == pytest.approx([4.6, 4.2, 4.7])  # -268.95 °C = 4.2 K

    # A long export (t,channel,value) through the package entry point: zones in the text.
    long_export = tmp_path / "long.csv"
    long_export.write_text(
        "t,channel,value\n"
        f"2026-03-02T09:01:00Z,{lab.gauge.pk},2e-10 mbar\n"
        f"2026-03-02T10:01:00.5+01:00,{lab.head.pk},4.5\n"
    )
    result = run_client(
        "--url", server, "--once", "--csv", str(long_export),
        state=lab.state, token_file=lab.token_file, module=True,
    )  # fmt: skip
    assert result.status == 0, result.stderr
    assert stored(lab.gauge)[T0 + timedelta(minutes=1)] == 2e-10
    assert stored(lab.head)[T0 + timedelta(minutes=1, milliseconds=500)] == 4.5


# --- (2) the server away, then back -----------------------------------------------------------


@pytest.mark.django_db(transaction=True)
def test_batches_spooled_while_the_server_is_down_are_replayed_in_order(lab, tmp_path):
    port = _free_port()  # nothing listens here yet
    url = f"http://127.0.0.1:{port}/api/v1/readings"
    rows = [
        {"channel": lab.gauge.pk, "t": iso(T0 + timedelta(seconds=i)), "value": 1e-10 + i * 1e-14}
        for i in range(2500)
    ]
    # The last batch repeats the first instant with another value: whichever batch reaches
    # the server first is the one stored, so the stored value shows the order of replay.
    rows.append({"channel": lab.gauge.pk, "t": iso(T0), "value": "9e-9 mbar"})

    down = run_client(
        "--url", url, "--once", "--stdin", "--batch", "1000",
        state=lab.state, token_file=lab.token_file, stdin=json_lines(rows),
    )  # fmt: skip
    assert down.status == 1, down.stderr
    assert "connection refused" in down.stderr
    assert down.summary["pending_batches"] == 3 and down.summary["pending_readings"] == 2501
    entries = spool_entries(lab.state)
    assert [e["seq"] for e in entries] == [1, 2, 3]
    assert [r for e in entries for r in e["rows"]] == rows  # in order, nothing dropped
    assert Reading.objects.count() == 0

    with labbook_server(port, tmp_path / "server") as live:
        assert live == url
        back = run_client(
            "--url", url, "--once", "--verbose", state=lab.state, token_file=lab.token_file
        )
    assert back.status == 0, back.stderr
    assert back.summary["sent"] == 2501
    assert (back.summary["inserted"], back.summary["duplicates"]) == (2500, 1)
    sent_order = [line.split("batch ")[1].split(":")[0] for line in back.stderr.splitlines()
                  if " readings, " in line and "batch " in line]  # fmt: skip
    assert sent_order == ["1", "2", "3"]
    assert Reading.objects.filter(channel=lab.gauge).count() == 2500
    assert stored(lab.gauge)[T0] == 1e-10  # batch 1 before batch 3
    assert (lab.state / "spool.jsonl").read_bytes() == b""
    assert json.loads((lab.state / "state.json").read_text())["delivered_seq"] == 3


# --- (3) a batch sent twice -------------------------------------------------------------------


@pytest.mark.django_db(transaction=True)
def test_a_batch_sent_again_after_a_crash_is_stored_once(server, lab, tmp_path):
    rows = [
        {"channel": lab.head.pk, "t": iso(T0 + timedelta(seconds=i)), "value": 4.2 + i / 1000}
        for i in range(1500)
    ]
    dead = f"http://127.0.0.1:{_free_port()}/api/v1/readings"
    spooled = run_client(
        "--url", dead, "--once", "--stdin", state=lab.state, token_file=lab.token_file,
        stdin=json_lines(rows),
    )  # fmt: skip
    assert spooled.status == 1 and spooled.summary["pending_batches"] == 2
    # What the disk holds while a batch is in flight: a client killed after the server stored
    # the batch but before the client noted the answer leaves exactly this behind.
    in_flight = tmp_path / "in-flight"
    shutil.copytree(lab.state, in_flight, ignore=shutil.ignore_patterns("lock"))

    first = run_client("--url", server, "--once", state=lab.state, token_file=lab.token_file)
    assert first.status == 0, first.stderr
    assert (first.summary["inserted"], first.summary["duplicates"]) == (1500, 0)

    shutil.rmtree(lab.state)
    shutil.copytree(in_flight, lab.state)
    again = run_client("--url", server, "--once", state=lab.state, token_file=lab.token_file)
    assert again.status == 0, again.stderr
    assert (again.summary["sent"], again.summary["inserted"]) == (1500, 0)
    assert again.summary["duplicates"] == 1500
    assert Reading.objects.filter(channel=lab.head).count() == 1500
    assert spool_entries(lab.state) == []


# --- (4) following a log across rotation and restarts -----------------------------------------


def _log_line(i: int) -> str:
    return f"{iso(T0 + timedelta(seconds=i))},{2e-10 + i * 1e-12:.4e},{4.2 + i / 100:.2f}\n"


@pytest.mark.django_db(transaction=True)
def test_a_followed_log_survives_rotation_and_a_restart_resumes_at_its_offset(
    server, lab, tmp_path
):
    log_path = tmp_path / "chamber.log"
    header = "time,gauge,head\n"
    mapping = ["--map", f"gauge={lab.gauge.pk}:mbar", "--map", f"head={lab.head.pk}"]

    def write_with_rotation() -> None:
        with open(log_path, "w") as log:
            log.write(header)
            for i in range(5):
                line = _log_line(i)
                if i == 2:  # a line written in two pieces: never read half
                    log.write(line[:12])
                    log.flush()
                    time.sleep(0.3)
                    line = line[12:]
                log.write(line)
                log.flush()
                time.sleep(0.05)
        time.sleep(0.3)
        os.rename(log_path, tmp_path / "chamber.log.1")  # what logrotate does
        time.sleep(0.3)  # a moment with no log at all
        with open(log_path, "w") as log:
            log.write(header)
            for i in range(5, 10):
                log.write(_log_line(i))
                log.flush()
                time.sleep(0.05)

    writer = threading.Thread(target=write_with_rotation)
    writer.start()
    try:
        followed = run_client(
            "--url", server, "--follow", str(log_path), *mapping, "--flush-seconds", "0.2",
            "--poll-seconds", "0.05", "--max-seconds", "3.5",
            state=lab.state, token_file=lab.token_file,
        )  # fmt: skip
    finally:
        writer.join(timeout=10)
    assert followed.status == 0, followed.stderr
    assert followed.summary["inserted"] == 20, followed.stderr
    assert sorted(stored(lab.gauge)) == [T0 + timedelta(seconds=i) for i in range(10)]
    assert stored(lab.head)[T0 + timedelta(seconds=2)] == pytest.approx(4.22)

    # While the client is stopped the log grows and is rotated once more.
    with open(log_path, "a") as log:
        log.write(_log_line(10) + _log_line(11))
    os.rename(log_path, tmp_path / "chamber.log.0")
    log_path.write_text(header + _log_line(12) + _log_line(13) + _log_line(14))

    resumed = run_client(
        "--url", server, "--follow", str(log_path), *mapping, "--once",
        state=lab.state, token_file=lab.token_file,
    )  # fmt: skip
    assert resumed.status == 0, resumed.stderr
    # Nothing resent (no duplicates), nothing skipped (lines 10 and 11 of the rotated file).
    assert (resumed.summary["inserted"], resumed.summary["duplicates"]) == (10, 0)
    assert sorted(stored(lab.gauge)) == [T0 + timedelta(seconds=i) for i in range(15)]
    assert Reading.objects.count() == 30


# --- (5) rows the server rejects ----------------------------------------------------------------


@pytest.mark.django_db(transaction=True)
def test_rejected_rows_go_to_the_rejected_log_and_the_good_rows_are_stored(
    server, lab, manager, other_instrument
):
    elsewhere = create_channel(
        other_instrument, name="other gauge", quantity="pressure", unit="mbar", actor=manager
    )
    lines = [
        json.dumps({"channel": lab.gauge.pk, "t": iso(T0), "value": "2e-10 mbar"}),
        json.dumps({"channel": lab.gauge.pk, "t": iso(T0 + timedelta(seconds=1)), "value": "3 K"}),
        json.dumps({"channel": 999_999, "t": iso(T0), "value": 1.0}),
        json.dumps({"channel": elsewhere.pk, "t": iso(T0), "value": 1e-9}),  # not this token's
        f"{iso(T0 + timedelta(seconds=2))},{lab.head.pk},4.4 K",  # a CSV line
        f"2026-03-02 09:00:03,{lab.head.pk},4.5",  # no zone: refused by the client itself
        json.dumps({"channel": lab.head.pk, "t": iso(T0 + timedelta(seconds=4)), "value": "NaN"}),
    ]
    result = run_client(
        "--url", server, "--once", "--stdin", state=lab.state, token_file=lab.token_file,
        stdin="\n".join(lines) + "\n",
    )  # fmt: skip
    assert result.status == 3, result.stderr
    assert result.summary["inserted"] == 2 and result.summary["rejected"] == 5
    assert result.summary["pending_readings"] == 0  # rejected rows are not sent again
    assert stored(lab.gauge) == {T0: 2e-10}
    assert stored(lab.head) == {T0 + timedelta(seconds=2): 4.4}
    assert not Reading.objects.filter(channel=elsewhere).exists()

    entries = [json.loads(line) for line in (lab.state / "rejected.jsonl").read_text().splitlines()]
    by_stage = {}
    for entry in entries:
        by_stage.setdefault(entry["stage"], []).append(entry)
    server_side = {e["row"]["channel"]: e["error"] for e in by_stage["server"]}
    assert set(server_side) == {lab.gauge.pk, 999_999, elsewhere.pk}
    assert "does not exist" in server_side[999_999]
    assert "instrument" in server_side[elsewhere.pk]
    assert server_side[lab.gauge.pk]  # the unit's reason, in the server's words
    client_side = sorted(e["error"] for e in by_stage["client"])
    assert len(client_side) == 2
    assert any("no time zone" in error for error in client_side)
    assert any("not a finite number" in error for error in client_side)


# --- (6) a token the server refuses -------------------------------------------------------------


@pytest.mark.django_db(transaction=True)
def test_a_refused_token_stops_the_client_and_keeps_the_readings(server, lab, member, tmp_path):
    row = json_lines([{"channel": lab.gauge.pk, "t": iso(T0), "value": 3e-10}])
    wrong = tmp_path / "wrong-token"
    wrong.write_text("lbk_" + "x" * 40 + "\n")
    wrong.chmod(0o644)
    refused = run_client(
        "--url", server, "--once", "--stdin", state=lab.state, token_file=wrong, stdin=row
    )
    assert refused.status == 2
    assert "refused the token (401" in refused.stderr and "mint_token" in refused.stderr
    assert "can be read by other users" in refused.stderr
    assert "x" * 40 not in refused.stderr
    assert refused.summary["pending_readings"] == 1  # kept for when the token is fixed

    _, read_only = mint_token(member, read_only=True)
    read_only_file = tmp_path / "read-only-token"
    read_only_file.write_text(read_only)
    read_only_file.chmod(0o600)
    forbidden = run_client("--url", server, "--once", state=lab.state, token_file=read_only_file)
    assert forbidden.status == 2
    assert "(403 this token is read-only)" in forbidden.stderr
    assert read_only not in forbidden.stderr + json.dumps(forbidden.summary)

    fixed = run_client("--url", server, "--once", state=lab.state, token_file=lab.token_file)
    assert fixed.status == 0, fixed.stderr
    assert stored(lab.gauge) == {T0: 3e-10}


# --- Python 3.8 ---------------------------------------------------------------------------------


def _python_3_8() -> str | None:
    candidates = sorted(glob.glob(os.path.expanduser("~/.pyenv/versions/3.8*/bin/python3.8")))
    candidates += [found for found in [shutil.which("python3.8")] if found]
    for candidate in candidates:
        try:
            probe = subprocess.run(
                [candidate, "-c", "import sys; print(sys.version_info[:2] == (3, 8))"],
                capture_output=True, text=True, timeout=20,
            )  # fmt: skip
        except (OSError, subprocess.TimeoutExpired):
            continue
        if probe.stdout.strip() == "True":  # a pyenv shim without 3.8 selected prints nothing
            return candidate
    return None


@pytest.mark.django_db(transaction=True)
def test_the_copied_file_runs_on_python_3_8(server, lab, standalone, tmp_path):
    python = _python_3_8()
    if python is None:
        pytest.skip("no Python 3.8 interpreter on this machine")
    export = tmp_path / "gauge.csv"
    export.write_text("t,Prep\n2026-03-02 10:00:00,2.5e-10\n2026-03-02 10:00:05,2.6e-10\n")
    common = ["--url", server, "--once", "--csv", str(export), "--map", f"Prep={lab.gauge.pk}"]
    no_zones = run_client(
        *common, "--time-zone", "Europe/Berlin", state=lab.state, token_file=lab.token_file,
        script=standalone, python=python,
    )  # fmt: skip
    assert no_zones.status == 2
    assert "--time-zone needs Python 3.9" in no_zones.stderr
    result = run_client(
        *common, "--utc-offset", "+01:00", state=lab.state, token_file=lab.token_file,
        script=standalone, python=python,
    )  # fmt: skip
    assert result.status == 0, result.stderr
    assert stored(lab.gauge) == {T0: 2.5e-10, T0 + timedelta(seconds=5): 2.6e-10}

    piped = run_client(
        "--url", server, "--once", "--stdin", state=lab.state, token_file=lab.token_file,
        script=standalone, python=python,
        stdin=json_lines([{"channel": lab.head.pk, "t": "2026-03-02T09:00:00Z", "value": "4.3 K"}]),
    )  # fmt: skip
    assert piped.status == 0, piped.stderr
    log_path = tmp_path / "head.log"
    log_path.write_text(
        f"2026-03-02T09:00:01Z,{lab.head.pk},4.4\n2026-03-02T09:00:02Z,{lab.head.pk},4"
    )
    followed = run_client(
        "--url", server, "--once", "--follow", str(log_path), state=lab.state,
        token_file=lab.token_file, script=standalone, python=python,
    )  # fmt: skip
    assert followed.status == 0, followed.stderr
    # The last line has no newline yet: the logger may still be writing it, so it waits.
    assert stored(lab.head) == {T0: 4.3, T0 + timedelta(seconds=1): 4.4}
    with open(log_path, "a") as log:
        log.write(".5\n")
    followed = run_client(
        "--url", server, "--once", "--follow", str(log_path), state=lab.state,
        token_file=lab.token_file, script=standalone, python=python,
    )  # fmt: skip
    assert followed.status == 0, followed.stderr
    assert stored(lab.head)[T0 + timedelta(seconds=2)] == 4.5


_NEWER_MODULES = {"zoneinfo", "graphlib", "tomllib"}  # stdlib, but not in 3.8
_NEWER_CALLS = {"removeprefix", "removesuffix", "bit_count", "is_relative_to", "with_stem"}
_GENERIC_BUILTINS = {"list", "dict", "tuple", "set", "frozenset", "type"}


def _problems_in(source: str) -> list[str]:
    """What in ``source`` would not run on Python 3.8 with only the standard library."""
    tree = ast.parse(source, feature_version=(3, 8))
    assert any(
        isinstance(node, ast.ImportFrom) and node.module == "__future__"
        and any(alias.name == "annotations" for alias in node.names)
        for node in tree.body
    )  # fmt: skip

    guarded: set[int] = set()
    annotations: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Try) and any(
            isinstance(h.type, ast.Name) and h.type.id == "ImportError" for h in node.handlers
        ):
            guarded.update(id(inner) for stmt in node.body for inner in ast.walk(stmt))
        for annotation in _annotations_of(node):
            annotations.update(id(inner) for inner in ast.walk(annotation))

    problems = []
    for node in ast.walk(tree):
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else [node.module]
            for name in names:
                top = name.split(".")[0]
                if top != "__future__" and top not in sys.stdlib_module_names:
                    problems.append(f"line {node.lineno}: {name} is not in the standard library")
                if top in _NEWER_MODULES and id(node) not in guarded:
                    problems.append(f"line {node.lineno}: {name} needs a guarded import")
        if isinstance(node, ast.Attribute) and node.attr in _NEWER_CALLS:
            problems.append(f"line {node.lineno}: .{node.attr} is newer than Python 3.8")
        if isinstance(node, ast.Attribute) and node.attr == "UTC":
            problems.append(f"line {node.lineno}: datetime.UTC is Python 3.11+")
        if (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id == "zip"
            and any(keyword.arg == "strict" for keyword in node.keywords)
        ):
            problems.append(f"line {node.lineno}: zip(strict=) is Python 3.10+")
        if (
            isinstance(node, ast.Subscript)
            and isinstance(node.value, ast.Name)
            and node.value.id in _GENERIC_BUILTINS
            and id(node) not in annotations
        ):
            problems.append(f"line {node.lineno}: {node.value.id}[...] at run time is 3.9+")
        if (
            isinstance(node, ast.BinOp)
            and isinstance(node.op, ast.BitOr)
            and id(node) not in annotations
            and any(_is_type_or_dict(side) for side in (node.left, node.right))
        ):
            problems.append(f"line {node.lineno}: '|' of types or dicts at run time is 3.9+")
    return problems


def test_the_client_is_python_3_8_syntax_and_imports_only_the_standard_library():
    assert _problems_in(CLIENT.read_text()) == []
    # The checker itself finds what it is meant to find.
    bad = (
        "from __future__ import annotations\n"
        "import requests\nimport zoneinfo\n"
        "X = list[int]\nY = {} | {}\nZ = 'ab'.removeprefix('a')\n"
        "W = zip([], [], strict=True)\n"
        "def f(a: list[int] | None) -> dict[str, int] | None: return None\n"
    )
    assert len(_problems_in(bad)) == 6
    with pytest.raises(SyntaxError):
        _problems_in("match x:\n    case 1: pass\n")


def _is_type_or_dict(node) -> bool:
    if isinstance(node, (ast.Dict, ast.DictComp)):
        return True
    if isinstance(node, ast.Constant) and node.value is None:
        return True
    return isinstance(node, ast.Name) and node.id in _GENERIC_BUILTINS | {"int", "str", "float"}


def _annotations_of(node):
    if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
        arguments = node.args
        every = arguments.posonlyargs + arguments.args + arguments.kwonlyargs
        every += [a for a in (arguments.vararg, arguments.kwarg) if a is not None]
        yield from (a.annotation for a in every if a.annotation is not None)
        if node.returns is not None:
            yield node.returns
    elif isinstance(node, ast.AnnAssign):
        yield node.annotation


# --- answers that are not labbook's results (a stub HTTP server on loopback) --------------------


class _Stub:
    """Answers each POST with the next scripted (status, headers, body) and records bodies."""

    def __init__(self, script):
        self.script = list(script)
        self.requests: list[tuple[float, list]] = []
        stub = self

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self):  # the name http.server dispatches to
                body = json.loads(self.rfile.read(int(self.headers["Content-Length"])))
                stub.requests.append((time.monotonic(), body))
                status, headers, payload = stub.answer(body)
                data = payload if isinstance(payload, bytes) else json.dumps(payload).encode()
                self.send_response(status)
                for key, value in headers.items():
                    self.send_header(key, value)
                self.send_header("Content-Length", str(len(data)))
                self.end_headers()
                self.wfile.write(data)

            def log_message(self, *args):
                pass

        self.httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}/api/v1/readings"
        self.thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)

    def answer(self, body):
        step = self.script.pop(0) if len(self.script) > 1 else self.script[0]
        return step(body) if callable(step) else step

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.httpd.shutdown()
        self.httpd.server_close()


def _ok(body):
    count = len(body)
    return 200, {}, {"accepted": count, "inserted": count, "duplicates": 0, "rejected": []}


ROWS = [{"channel": 5, "t": iso(T0 + timedelta(seconds=i)), "value": 1.0 + i} for i in range(6)]


def test_a_503_with_retry_after_is_waited_for_and_the_same_batch_sent_again(tmp_path):
    token = tmp_path / "token"
    token.write_text("lbk_stub")
    token.chmod(0o600)
    script = [(503, {"Retry-After": "1"}, {"detail": "the database is unavailable"}), _ok]
    with _Stub(script) as stub:
        result = run_client(
            "--url", stub.url, "--stdin", "--max-seconds", "8", state=tmp_path / "s",
            token_file=token, stdin=json_lines(ROWS),
        )  # fmt: skip
    assert result.status == 0, result.stderr
    assert "503: the database is unavailable" in result.stderr
    (first_at, first), (second_at, second) = stub.requests
    assert first == second == ROWS
    assert second_at - first_at >= 0.95  # Retry-After obeyed


def test_a_batch_refused_whole_is_logged_and_not_sent_again(tmp_path):
    token = tmp_path / "token"
    token.write_text("lbk_stub")
    token.chmod(0o600)
    with _Stub([(422, {}, {"detail": "the body must be a JSON list"})]) as stub:
        result = run_client(
            "--url", stub.url, "--stdin", "--once", state=tmp_path / "s", token_file=token,
            stdin=json_lines(ROWS),
        )  # fmt: skip
        again = run_client("--url", stub.url, "--once", state=tmp_path / "s", token_file=token)
    assert (result.status, again.status) == (3, 0)
    assert len(stub.requests) == 1
    rejected = [json.loads(line) for line in (tmp_path / "s" / "rejected.jsonl").open()]
    assert [entry["row"] for entry in rejected] == ROWS
    assert {entry["error"] for entry in rejected} == {"422: the body must be a JSON list"}


def test_a_batch_too_large_for_the_server_is_sent_in_halves(tmp_path):
    token = tmp_path / "token"
    token.write_text("lbk_stub")
    token.chmod(0o600)

    def small_only(body):
        return _ok(body) if len(body) <= 2 else (413, {}, {"detail": "too large"})

    with _Stub([small_only]) as stub:
        result = run_client(
            "--url", stub.url, "--stdin", "--once", state=tmp_path / "s", token_file=token,
            stdin=json_lines(ROWS),
        )  # fmt: skip
    assert result.status == 0, result.stderr
    delivered = [row for _, body in stub.requests if len(body) <= 2 for row in body]
    assert delivered == ROWS  # every row once, in order


def test_an_answer_that_is_not_a_readings_result_keeps_the_batch(tmp_path):
    token = tmp_path / "token"
    token.write_text("lbk_stub")
    token.chmod(0o600)
    with _Stub([(200, {"Content-Type": "text/html"}, b"<html>Sign in to the Wi-Fi</html>")]) as s:
        result = run_client(
            "--url", s.url, "--stdin", "--once", state=tmp_path / "s", token_file=token,
            stdin=json_lines(ROWS),
        )  # fmt: skip
    assert result.status == 2
    assert "without a readings result" in result.stderr
    assert result.summary["pending_readings"] == len(ROWS)


# --- pieces without a server --------------------------------------------------------------------


def test_times_are_read_in_the_forms_loggers_write():
    reader = logger.TimeReader()
    assert reader.parse("2026-03-02T09:00:00Z") == T0
    assert reader.parse("2026-03-02 10:00:00.5+01:00") == T0 + timedelta(milliseconds=500)
    # Nanoseconds are cut to microseconds (datetime's resolution), a comma is a decimal mark.
    assert reader.parse("2026-03-02T09:00:00,123456789 UTC") == T0 + timedelta(microseconds=123456)
    assert reader.parse("2026-03-02T04:00:00-0500") == T0
    with pytest.raises(logger.RowError, match="no time zone"):
        reader.parse("2026-03-02 09:00:00")
    assert logger.TimeReader("epoch").parse("1772442000") == T0
    assert logger.TimeReader("epoch-ms").parse(1772442000250) == T0 + timedelta(milliseconds=250)

    # The night summer time ends in Berlin (25 Oct 2026): 02:00-02:59 local happens twice.
    berlin = logger.TimeReader("iso", logger.zone_from_args("Europe/Berlin", None))
    local = ["01:59", "02:00", "02:59", "02:00", "02:30", "03:00"]
    instants = [berlin.parse(f"2026-10-25 {hm}:00") for hm in local]
    assert [t.strftime("%H:%M") for t in instants] == [
        "23:59", "00:00", "00:59", "01:00", "01:30", "02:00"
    ]  # fmt: skip


def test_the_spool_recovers_from_an_entry_cut_short_by_a_crash(tmp_path):
    path = tmp_path / "spool.jsonl"
    spool = logger.Spool(str(path), delivered_seq=0)
    spool.append(ROWS[:3], "test")
    with open(path, "ab") as handle:
        handle.write(b'{"v":1,"seq":2,"rows":[{"chan')  # the process died mid-append
    reloaded = logger.Spool(str(path), delivered_seq=0)
    assert reloaded.pending_batches == 1
    assert reloaded.append(ROWS[3:], "test") == 2
    again = logger.Spool(str(path), delivered_seq=0)
    assert [again.head()[1]] == [ROWS[:3]]
    again.delivered(1)
    assert again.head() == (2, ROWS[3:])
    again.compact()
    assert [json.loads(line)["seq"] for line in path.read_text().splitlines()] == [2]
    assert logger.Spool(str(path), delivered_seq=1).head() == (2, ROWS[3:])


def test_a_truncated_log_is_read_again_from_its_start(tmp_path):
    path = tmp_path / "gauge.log"
    path.write_text("t,channel,value\n" + "".join(f"{iso(T0)},{c},1\n" for c in (1, 2)))
    mapper = logger.RowMapper({}, logger.TimeReader())
    follower = logger.LogFollower(
        str(path), mapper, delimiter=",", encoding="utf-8", saved=None, start_at_end=False
    )
    assert [row["channel"] for row in follower.poll(100)] == [1, 2]
    path.write_text(f"{iso(T0)},3,1\n")  # copytruncate: the same file, shorter
    # The file is shorter than the position: noticed at its end, and read from byte 0.
    assert [row["channel"] for row in follower.poll(100)] == [3]
