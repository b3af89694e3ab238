"""Fault: the database hangs instead of going away (a network partition, a stopped server
process): connections are accepted and never answered. Requests must still get the clear,
retryable 503 within seconds, not hang until gunicorn kills the worker (an HTML 500 after
30 s). Stood in for by a loopback listener that accepts and never speaks."""

from __future__ import annotations

import socket
import threading
import time

import pytest
import requests

from .conftest import Server, needs_postgres

pytestmark = [pytest.mark.postgres, pytest.mark.django_db(transaction=True)]


@pytest.fixture
def black_hole():
    listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    listener.bind(("127.0.0.1", 0))
    listener.listen(64)
    held: list[socket.socket] = []
    stop = threading.Event()

    def accept() -> None:
        listener.settimeout(0.2)
        while not stop.is_set():
            try:
                held.append(listener.accept()[0])  # kept open, never answered
            except OSError:
                continue

    thread = threading.Thread(target=accept, daemon=True)
    thread.start()
    yield listener.getsockname()[1]
    stop.set()
    thread.join(2)
    for peer in held:
        peer.close()
    listener.close()


def test_a_hung_database_gives_a_clear_503_within_seconds(tmp_path, black_hole):
    needs_postgres()
    server = Server(
        tmp_path, workers=1, DATABASE_URL=f"postgresql://postgres@127.0.0.1:{black_hole}/lab"
    )
    server.start()  # an unauthenticated call answers 401 without asking the database
    session = requests.Session()
    session.trust_env = False
    try:
        started = time.monotonic()
        health = session.get(f"{server.url}/healthz", timeout=40)
        health_s = time.monotonic() - started
        started = time.monotonic()
        api = session.get(
            f"{server.url}/api/v1/files",
            headers={"Authorization": "Bearer not-a-real-token"},
            timeout=40,
        )
        api_s = time.monotonic() - started
    finally:
        server.stop()
    assert health.status_code == 503, health.text
    assert health.json()["database"] != "ok"
    assert api.status_code == 503, api.text
    assert "database" in api.json()["detail"] and api.headers["Retry-After"].isdigit()
    # connect_timeout is 5 s; gunicorn's worker timeout (30 s) is never reached.
    assert health_s < 15 and api_s < 15, (health_s, api_s)
