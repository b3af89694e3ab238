"""The state of the services labbook needs, for /healthz (monitors, load balancers)."""

from __future__ import annotations

import time

from django.conf import settings
from django.db import connection


def database_state() -> str:
    try:
        with connection.cursor() as cursor:
            cursor.execute("SELECT 1")
            cursor.fetchone()
    except Exception:  # noqa: BLE001 - any failure means "down"; details stay in the logs
        return "down"
    return "ok"


def broker_state() -> str:
    if settings.CELERY_TASK_ALWAYS_EAGER:
        return "embedded"
    url = settings.CELERY_BROKER_URL
    if url.startswith(("redis://", "rediss://")):
        import redis

        try:
            redis.Redis.from_url(url, socket_connect_timeout=1, socket_timeout=1).ping()
        except Exception:  # noqa: BLE001
            return "down"
        return "ok"
    from labbook.celery import app

    try:
        with app.connection_for_write() as conn:
            conn.ensure_connection(max_retries=1, timeout=1)
    except Exception:  # noqa: BLE001
        return "down"
    return "ok"


_worker_cache: dict[str, tuple[float, int]] = {}


def worker_count(timeout: float = 1.0, cache_seconds: float = 10.0) -> int | None:
    """How many workers answered a ping; cached briefly so a busy monitor cannot flood them."""
    if settings.CELERY_TASK_ALWAYS_EAGER:
        return None
    cached = _worker_cache.get("n")
    now = time.monotonic()
    if cached and now - cached[0] < cache_seconds:
        return cached[1]
    from labbook.celery import app

    try:
        replies = app.control.ping(timeout=timeout) or []
    except Exception:  # noqa: BLE001
        replies = []
    _worker_cache["n"] = (now, len(replies))
    return len(replies)


def service_health() -> tuple[int, dict]:
    """HTTP status and a body naming only each service's state (nothing else is disclosed)."""
    database = database_state()
    broker = broker_state()
    workers = None if broker != "ok" else worker_count()
    if broker == "embedded":
        worker_state = "embedded"
    elif workers:
        worker_state = "ok"
    else:
        worker_state = "none"
    body = {"database": database, "broker": broker, "workers": worker_state}
    if workers is not None:
        body["worker_count"] = workers
    healthy = database == "ok" and broker in ("ok", "embedded")
    # No worker is degraded, not down: uploads are still accepted and wait as pending rows.
    body["status"] = (
        "ok"
        if healthy and worker_state in ("ok", "embedded")
        else ("degraded" if healthy else "down")
    )
    return (200 if healthy else 503), body
