from __future__ import annotations

import pytest
from django.test import Client, override_settings

pytestmark = pytest.mark.django_db


def test_healthz_needs_no_login_and_names_only_service_states():
    response = Client().get("/healthz")
    assert response.status_code == 200
    body = response.json()
    assert set(body) <= {"status", "database", "broker", "workers", "worker_count"}
    assert body["database"] == "ok"
    assert response["Cache-Control"].startswith("max-age=0")


@override_settings(CELERY_TASK_ALWAYS_EAGER=True)
def test_embedded_mode_reports_embedded_broker():
    body = Client().get("/healthz").json()
    assert body == {"database": "ok", "broker": "embedded", "workers": "embedded", "status": "ok"}


@override_settings(CELERY_TASK_ALWAYS_EAGER=False, CELERY_BROKER_URL="redis://127.0.0.1:1/0")
def test_unreachable_broker_is_503():
    response = Client().get("/healthz")
    assert response.status_code == 503
    assert response.json() == {
        "database": "ok",
        "broker": "down",
        "workers": "none",
        "status": "down",
    }


def test_healthz_refuses_writes():
    assert Client().post("/healthz").status_code == 405
