"""Failed logins are throttled per username and per client address (accounts.throttle)."""

from __future__ import annotations

import logging

import pytest
from django.core.cache import cache
from django.test import Client

pytestmark = pytest.mark.django_db

PASSWORD = "bo-pw-Lattice-7"  # tests/conftest.py: "<username>-pw-Lattice-7"


@pytest.fixture(autouse=True)
def _fresh_counts(settings):
    settings.LABBOOK_LOGIN_MAX_FAILURES = 5
    settings.LABBOOK_LOGIN_WINDOW_S = 900
    settings.LABBOOK_LOGIN_COOLDOWN_S = 900
    cache.clear()
    yield
    cache.clear()


def attempt(username: str, password: str, address: str = "192.0.2.10"):
    return Client(REMOTE_ADDR=address).post("/login/", {"username": username, "password": password})


def test_five_failures_for_a_username_then_429_with_the_wait_named(member):
    for _ in range(4):
        assert attempt("bo", "guess").status_code == 200  # the form again, "do not match"
    fifth = attempt("bo", "guess")
    assert fifth.status_code == 429
    assert fifth["Retry-After"] == "900"
    assert b"Too many failed logins for this username. Try again in 15 minutes." in fifth.content
    # Even the right password is refused during the cooldown, and from another address.
    refused = attempt("bo", PASSWORD, address="198.51.100.7")
    assert refused.status_code == 429
    assert "_auth_user_id" not in refused.wsgi_request.session


def test_the_username_counter_ignores_case_and_spaces(member):
    for name in ("bo", "Bo", " bo", "BO ", "bO"):
        response = attempt(name, "guess", address=f"192.0.2.{len(name) + ord(name[-1])}")
    assert response.status_code == 429


def test_five_failures_from_one_address_over_many_usernames(member, make_user):
    for i in range(4):
        assert attempt(f"nobody-{i}", "guess", address="203.0.113.5").status_code == 200
    assert attempt("nobody-4", "guess", address="203.0.113.5").status_code == 429
    refused = attempt("bo", PASSWORD, address="203.0.113.5")
    assert refused.status_code == 429
    assert b"for this address" in refused.content
    # Another address logs in as bo at once: the username itself is not blocked.
    assert attempt("bo", PASSWORD, address="203.0.113.6").status_code == 302


def test_a_successful_login_resets_the_username_counter(member):
    for i in range(4):
        attempt("bo", "guess", address=f"192.0.2.{i + 20}")
    assert attempt("bo", PASSWORD, address="192.0.2.40").status_code == 302
    for i in range(4):
        assert attempt("bo", "guess", address=f"192.0.2.{i + 50}").status_code == 200
    assert attempt("bo", "guess", address="192.0.2.60").status_code == 429


def test_the_cooldown_ends(member, settings, monkeypatch):
    import time

    from labbook.accounts import throttle

    for _ in range(5):
        attempt("bo", "guess")
    assert attempt("bo", PASSWORD).status_code == 429
    later = time.time() + 901
    monkeypatch.setattr(throttle.time, "time", lambda: later)
    # The blocked-until instant has passed (a cache entry may outlive it by a moment).
    assert throttle.refusal("bo", "192.0.2.10") is None
    assert attempt("bo", PASSWORD).status_code == 302


def test_throttling_is_logged(member, caplog):
    with caplog.at_level(logging.INFO, logger="labbook.accounts.throttle"):
        for _ in range(5):
            attempt("bo", "guess")
    messages = [r.getMessage() for r in caplog.records if r.name == "labbook.accounts.throttle"]
    assert any("failed login for username 'bo' from 192.0.2.10" in m for m in messages)
    assert any(
        m.startswith("login throttled: 5 failed attempts for username 'bo'") for m in messages
    )
    warnings = [r for r in caplog.records if r.levelno == logging.WARNING]
    assert warnings and all("guess" not in r.getMessage() for r in caplog.records)


def test_the_login_still_works_and_the_form_still_says_do_not_match(member):
    wrong = attempt("bo", "guess")
    assert wrong.status_code == 200 and b"do not match" in wrong.content
    ok = attempt("bo", PASSWORD)
    assert ok.status_code == 302 and ok["Location"] == "/"


def test_user_text_in_the_refusal_is_escaped(member):
    name = "<script>x</script>"
    for _ in range(5):
        response = attempt(name, "guess")
    assert response.status_code == 429
    assert b"<script>x</script>" not in response.content
