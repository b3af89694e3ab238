"""Personas and helpers shared by every test: a manager, a member, an outsider (STYLE.md)."""

from __future__ import annotations

import pytest
from django.test import Client

from labbook.accounts.actions import mint_token, set_role

_approx = pytest.approx


def _approx_without_absolute_floor(expected, rel=None, abs=None, nan_ok=False):  # noqa: A002
    """pytest.approx with no 1e-12 absolute tolerance unless a test asks for one.

    labbook's quantities are SI: pressures of 1e-10 mbar, currents of 1e-11 A, heights of
    1e-10 m. pytest's default absolute tolerance of 1e-12 would let such a comparison pass
    whatever the relative tolerance says; here the relative tolerance is the check.
    """
    if abs is None:
        abs = 0.0 if _nonzero(expected) else 1e-12  # noqa: A001
        rel = 1e-6 if rel is None else rel  # pytest's own default, kept when abs is set
    return _approx(expected, rel=rel, abs=abs, nan_ok=nan_ok)


def _nonzero(expected) -> bool:
    try:
        return bool(expected != 0) and not hasattr(expected, "__len__")
    except (TypeError, ValueError):
        return False


pytest.approx = _approx_without_absolute_floor


@pytest.fixture
def make_user(django_user_model):
    def make(username: str, role: str = "member", **fields):
        user = django_user_model.objects.create_user(
            username=username, password=f"{username}-pw-Lattice-7", **fields
        )
        set_role(user, role)
        return user

    return make


@pytest.fixture
def manager(make_user):
    return make_user("mara", "manager", first_name="Mara", last_name="Quell")


@pytest.fixture
def member(make_user):
    return make_user("bo", "member", first_name="Bo", last_name="Ferrand")


@pytest.fixture
def outsider(make_user):
    return make_user("otto", "outsider")


@pytest.fixture
def instrument(manager):
    from labbook.instruments.actions import create_instrument

    return create_instrument(name="LTM-T", description="test microscope", actor=manager)


@pytest.fixture
def other_instrument(manager):
    from labbook.instruments.actions import create_instrument

    return create_instrument(name="LTM-U", description="the other microscope", actor=manager)


class ApiClient:
    """A Django test client that speaks JSON to /api/v1 with an optional bearer token."""

    def __init__(self, token: str | None = None, client: Client | None = None):
        self.client = client or Client()
        self.headers = {"Authorization": f"Bearer {token}"} if token else {}

    def get(self, path: str, **params):
        return self.client.get(f"/api/v1{path}", params, headers=self.headers)

    def post(self, path: str, body):
        return self.client.post(
            f"/api/v1{path}", body, content_type="application/json", headers=self.headers
        )


@pytest.fixture
def api_as():
    """``api_as(user)`` for a token with the given limits; ``api_as(None)`` is anonymous."""

    def make(user, *, instrument=None, read_only: bool = False) -> ApiClient:
        if user is None:
            return ApiClient()
        _, raw = mint_token(user, instrument=instrument, read_only=read_only)
        return ApiClient(raw)

    return make


@pytest.fixture(autouse=True)
def _plain_static_files(settings):
    """Tests render pages without running collectstatic first."""
    settings.STORAGES = {
        **settings.STORAGES,
        "staticfiles": {"BACKEND": "django.contrib.staticfiles.storage.StaticFilesStorage"},
    }


@pytest.fixture(autouse=True)
def _fresh_dashboard_plan(settings):
    """Tests see every reading on the next dashboard load; one test checks the reuse."""
    settings.LABBOOK_DASHBOARD_PLAN_SECONDS = 0


@pytest.fixture(autouse=True)
def _eager_celery(request):
    """Unit tests run tasks in-process even when a broker is configured; the tests marked
    ``worker`` switch this off and talk to a real worker."""
    from labbook.celery import app

    if request.node.get_closest_marker("worker"):
        yield
        return
    previous = app.conf.task_always_eager
    app.conf.task_always_eager = True
    yield
    app.conf.task_always_eager = previous
