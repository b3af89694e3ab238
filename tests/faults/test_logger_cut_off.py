"""Fault: the chamber PC's logger client loses the server for an hour.

The hour is simulated with time-stamped readings (two channels at 1 Hz, 7200 readings), not
by waiting: the client runs every ten minutes, as cron would run it, while nothing listens on
the server's port, and spools what it read. Then the server is back and the next run replays
the spool. Ten minutes delivered just before the cut are read again (a log re-read after the
PC restarted), so the replay must count them as duplicates and store them once.
"""

from __future__ import annotations

import json
import subprocess
import sys
from collections import Counter
from datetime import UTC, datetime, timedelta

import pytest

from labbook.accounts.actions import mint_token
from labbook.instruments.actions import create_channel
from labbook.instruments.models import Reading

from .conftest import PLAIN_ENV, ROOT, Server

pytestmark = [pytest.mark.postgres, pytest.mark.django_db(transaction=True)]

CLIENT = ROOT / "labbook" / "clients" / "logger.py"
T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
BEFORE_S = 600  # delivered before the cut
HOUR_S = 3600  # the cut
REREAD_S = 600  # read again after the cut: already stored


def _rows(channels, start_s: int, seconds: int) -> list[dict]:
    return [
        {"channel": channel, "t": (T0 + timedelta(seconds=s)).isoformat(),
         "value": 1e-10 + s * 1e-15 if n == 0 else 4.2 + s * 1e-6}
        for s in range(start_s, start_s + seconds)
        for n, channel in enumerate(channels)
    ]  # fmt: skip


def _run(url: str, state, token_file, rows: list[dict]) -> tuple[int, dict, str]:
    done = subprocess.run(
        [sys.executable, str(CLIENT), "--state-dir", str(state), "--token-file",
         str(token_file), "--url", url, "--once", "--stdin", "--batch", "500",
         "--timeout", "5"],
        input="".join(json.dumps(row) + "\n" for row in rows),
        capture_output=True, text=True, timeout=120, cwd=CLIENT.parent, env=PLAIN_ENV,
    )  # fmt: skip
    lines = done.stdout.strip().splitlines()
    return done.returncode, json.loads(lines[-1]) if lines else {}, done.stderr


def test_an_hour_cut_off_is_spooled_and_replayed_once(
    manager, member, instrument, tmp_path, fault_report
):
    gauge = create_channel(
        instrument, name="prep gauge", quantity="pressure", unit="mbar", gas="N2", actor=manager
    )
    head = create_channel(
        instrument, name="STM head", quantity="temperature", unit="K", actor=manager
    )
    channels = [gauge.pk, head.pk]
    _, token = mint_token(member, instrument=instrument, label="chamber PC")
    token_file = tmp_path / "token"
    token_file.write_text(token + "\n")
    token_file.chmod(0o600)
    state = tmp_path / "state"
    server = Server(tmp_path, workers=1, DB_CONN_MAX_AGE="0")
    readings = f"{server.url}/api/v1/readings"

    server.start()
    try:
        status, summary, stderr = _run(readings, state, token_file, _rows(channels, 0, BEFORE_S))
        assert status == 0, stderr
        assert summary["inserted"] == 2 * BEFORE_S
    finally:
        server.stop()

    # The hour: six cron runs, ten minutes each, against a port where nothing listens. The
    # first re-reads the last ten minutes already delivered.
    spooled = []
    for part in range(6):
        start = BEFORE_S + part * 600
        rows = _rows(channels, start - (REREAD_S if part == 0 else 0), 600 + (
            REREAD_S if part == 0 else 0))  # fmt: skip
        status, summary, stderr = _run(readings, state, token_file, rows)
        assert status == 1, stderr  # something is still in the spool
        assert "connection refused" in stderr.lower() or "refused" in stderr.lower(), stderr
        spooled.append(summary["pending_readings"])
    expected_spool = 2 * (HOUR_S + REREAD_S)
    assert spooled[-1] == expected_spool  # the spool filled, nothing dropped
    assert spooled == sorted(spooled)
    assert Reading.objects.count() == 2 * BEFORE_S

    server.start()  # the server is back, on the same port
    try:
        status, summary, stderr = _run(readings, state, token_file, [])
    finally:
        server.stop()
    stored = Counter(Reading.objects.values_list("channel_id", "t"))
    expected = 2 * (BEFORE_S + HOUR_S)
    lost = expected - len(stored)
    fault_report(
        "logger client cut off for an hour",
        tries=expected_spool,
        survived=summary.get("inserted", 0) + summary.get("duplicates", 0),
        lost=lost,
        note=f"readings spooled; {sum(c - 1 for c in stored.values())} doubled, "
        f"{summary.get('duplicates', 0)} resent counted as duplicates",
    )
    assert status == 0, stderr
    assert summary["sent"] == expected_spool and summary["pending_readings"] == 0
    assert (summary["inserted"], summary["duplicates"]) == (2 * HOUR_S, 2 * REREAD_S)
    assert len(stored) == expected and set(stored.values()) == {1}  # every instant, once
    assert (state / "spool.jsonl").read_bytes() == b""
    # The values are the ones logged, the re-read ones included.
    last = T0 + timedelta(seconds=BEFORE_S + HOUR_S - 1)
    assert Reading.objects.get(channel=head, t=last).value == pytest.approx(
        4.2 + (BEFORE_S + HOUR_S - 1) * 1e-6
    )
