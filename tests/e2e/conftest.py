"""The browser tests: Debian's chromium driven by Playwright against a live server.

Chromium is launched once for the whole package (``browser``); each test gets a fresh context
(cookies, storage) at the chamber PC's 1280×800. The server is pytest-django's ``live_server``
on the test database: SQLite in a file named by pid (settings.py), or PostgreSQL when
DATABASE_URL is set. Where chromium is missing the tests skip with the reason, except under
CI=true, where they fail: CI must run them (``make browser`` installs chromium where it can).
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from urllib.parse import quote

import pytest

ROOT = Path(__file__).resolve().parents[2]
SHOTS = ROOT / "var" / "e2e"  # under var/, which git ignores; CI keeps it as an artefact
CHROMIUM = Path(os.environ.get("LABBOOK_CHROMIUM", "/usr/bin/chromium"))
IN_CI = os.environ.get("CI", "").lower() == "true"
DESK = {"width": 1280, "height": 800}  # the chamber PC
PHONE = {"width": 390, "height": 844}  # the manager's phone on a Sunday
PASSWORD = "{}-pw-Lattice-7"  # tests/conftest.py's make_user


def _needs(condition: bool, reason: str) -> None:
    if not condition:
        if IN_CI:
            pytest.fail(f"CI must run the browser tests: {reason}")
        pytest.skip(reason)


@pytest.fixture(scope="package")
def browser():
    """One headless Chromium for every browser test."""
    _needs(
        CHROMIUM.exists(),
        f"no Chromium at {CHROMIUM}; `make browser` installs Debian's chromium where the "
        "machine allows (as root or with passwordless sudo)",
    )
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:  # pragma: no cover - the test extra installs it
        _needs(False, "the playwright package is missing (pip install -e '.[test]')")
    # Playwright's sync API keeps an asyncio loop on this thread; the ORM calls made by the
    # tests between browser steps are plain synchronous code, so Django's guard is relaxed for
    # the browser tests alone and put back after them.
    previous = os.environ.get("DJANGO_ALLOW_ASYNC_UNSAFE")
    os.environ["DJANGO_ALLOW_ASYNC_UNSAFE"] = "true"
    SHOTS.mkdir(parents=True, exist_ok=True)
    playwright = sync_playwright().start()
    try:
        chromium = playwright.chromium.launch(
            executable_path=str(CHROMIUM),
            headless=True,
            # A container without user namespaces cannot start the sandbox; /dev/shm is small.
            args=["--no-sandbox", "--disable-dev-shm-usage"],
        )
        try:
            yield chromium
        finally:
            chromium.close()
    finally:
        playwright.stop()
        if previous is None:
            os.environ.pop("DJANGO_ALLOW_ASYNC_UNSAFE", None)
        else:
            os.environ["DJANGO_ALLOW_ASYNC_UNSAFE"] = previous


@pytest.fixture(autouse=True)
def _files_apart(settings, tmp_path):
    settings.MEDIA_ROOT = str(tmp_path / "files")


@pytest.fixture(autouse=True)
def _quick_passwords(settings):
    """Every browser test makes its personas afresh; a deliberately slow password hash would
    cost seconds a test on a shared machine. The login form still checks the password."""
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]


@pytest.fixture
def context(browser, live_server):
    ctx = browser.new_context(
        base_url=live_server.url, viewport=DESK, locale="en-GB", reduced_motion="reduce"
    )
    ctx.set_default_timeout(10_000)
    yield ctx
    ctx.close()


@pytest.fixture
def page(context):
    page = context.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda exc: errors.append(str(exc)))
    page.js_errors = errors
    yield page
    assert not errors, f"JavaScript errors on the page: {errors}"


@pytest.fixture
def login_as(context, live_server):
    """Log a persona in through the login form; answers the page on the dashboard."""

    def login(page, user):
        page.goto("/login/")
        page.get_by_label("Username").fill(user.get_username())
        page.get_by_label("Password").fill(PASSWORD.format(user.get_username()))
        page.get_by_role("button", name="Log in").click()
        page.wait_for_url(f"{live_server.url}/")
        return page

    return login


@pytest.fixture
def signed_in(context, live_server):
    """A session for a persona, without the form (the login test drives the form)."""
    from django.conf import settings
    from django.test import Client

    def sign_in(user) -> None:
        client = Client()
        client.force_login(user)
        cookie = client.cookies[settings.SESSION_COOKIE_NAME].value
        context.add_cookies(
            [{"name": settings.SESSION_COOKIE_NAME, "value": cookie, "url": live_server.url}]
        )

    return sign_in


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")


@pytest.fixture
def shot(request) -> Callable[..., Path]:
    """``shot(page, "dashboard")`` saves var/e2e/<test>--dashboard-1280x800.png."""
    test = _slug(request.node.name.removeprefix("test_"))

    def save(page, name: str = "", *, full_page: bool = True) -> Path:
        size = page.viewport_size
        parts = [test, _slug(name)] if name else [test]
        path = SHOTS / f"{'--'.join(parts)}-{size['width']}x{size['height']}.png"
        page.screenshot(path=str(path), full_page=full_page)
        assert path.stat().st_size > 1000, f"empty screenshot {path}"
        return path

    return save


# --- a real worker, when the machine has the services (CI does) ----------------------------


def _url_of_test_database(connection) -> str:
    db = connection.settings_dict
    credentials = quote(db["USER"] or "")
    if db["PASSWORD"]:
        credentials += ":" + quote(db["PASSWORD"])
    host = db["HOST"] or "localhost"
    port = f":{db['PORT']}" if db["PORT"] else ""
    return f"postgresql://{credentials}@{host}{port}/{db['NAME']}"


def services_for_a_worker() -> bool:
    from django.conf import settings
    from django.db import connection

    return bool(settings.CELERY_BROKER_URL) and connection.vendor == "postgresql"


@pytest.fixture
def real_worker(settings) -> Iterator[str]:
    """A Celery worker process on its own queue, reading the live server's test database and
    files (as tests/core/test_services.py starts one)."""
    from django.db import connection

    from labbook.celery import app

    queue = f"labbook-e2e-{uuid.uuid4().hex[:8]}"
    env = {
        **os.environ,
        "DATABASE_URL": _url_of_test_database(connection),
        "CELERY_TASK_DEFAULT_QUEUE": queue,
        "LABBOOK_FILES_DIR": str(settings.MEDIA_ROOT),
    }
    env.pop("DJANGO_ALLOW_ASYNC_UNSAFE", None)
    worker = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "labbook", "worker", "--pool", "solo"]
        + ["--queues", queue, "--hostname", f"{queue}@%h", "--without-mingle"]
        + ["--without-gossip", "--loglevel", "WARNING"],
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
