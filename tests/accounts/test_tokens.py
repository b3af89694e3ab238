"""API tokens: stored hashed, minted by command, scoped to an instrument, read-only."""

from __future__ import annotations

import hashlib
from io import StringIO

import pytest
from django.core.management import call_command
from django.core.management.base import CommandError

from labbook.accounts.models import ApiToken

pytestmark = pytest.mark.django_db


def test_mint_token_prints_the_token_alone_on_its_last_line_and_stores_only_its_hash(member):
    out = StringIO()
    call_command("mint_token", member.username, stdout=out, stderr=StringIO())
    raw = out.getvalue().strip().splitlines()[-1]
    assert raw.startswith("lbk_") and len(raw) > 40
    token = ApiToken.objects.get(user=member)
    assert token.token_hash == hashlib.sha256(raw.encode()).hexdigest()
    stored = [str(value) for value in ApiToken.objects.values_list(flat=False).get()]
    assert raw not in stored  # the raw token is in no column


def test_minted_token_authenticates(member, api_as):
    out = StringIO()
    call_command("mint_token", member.username, stdout=out, stderr=StringIO())
    from tests.conftest import ApiClient

    response = ApiClient(out.getvalue().split()[-1]).get("/me")
    assert response.status_code == 200
    assert response.json()["username"] == member.username


def test_mint_token_with_instrument_scope_and_read_only(member, instrument):
    out = StringIO()
    call_command(
        "mint_token",
        member.username,
        "--instrument",
        instrument.name,
        "--read-only",
        stdout=out,
        stderr=StringIO(),
    )
    token = ApiToken.objects.get(user=member)
    assert token.instrument == instrument and token.read_only


def test_mint_token_names_an_unknown_user_or_instrument(member):
    with pytest.raises(CommandError, match="no user named 'nobody'"):
        call_command("mint_token", "nobody", stdout=StringIO())
    with pytest.raises(CommandError, match="no instrument 'LTM-404'"):
        call_command("mint_token", member.username, "--instrument", "LTM-404", stdout=StringIO())


def test_revoked_and_unknown_tokens_are_refused(member, api_as):
    from labbook.accounts.actions import mint_token, revoke_token
    from tests.conftest import ApiClient

    token, raw = mint_token(member)
    assert ApiClient(raw).get("/me").status_code == 200
    revoke_token(token)
    assert ApiClient(raw).get("/me").status_code == 401
    assert ApiClient("lbk_not-a-token").get("/me").status_code == 401


def test_expired_token_is_refused(member):
    from datetime import timedelta

    from django.utils import timezone

    from labbook.accounts.actions import mint_token
    from tests.conftest import ApiClient

    _, raw = mint_token(member, expires_at=timezone.now() - timedelta(seconds=1))
    assert ApiClient(raw).get("/me").status_code == 401


def test_token_use_is_recorded(member):
    from labbook.accounts.actions import mint_token
    from tests.conftest import ApiClient

    token, raw = mint_token(member)
    assert token.last_used_at is None
    ApiClient(raw).get("/me")
    token.refresh_from_db()
    assert token.last_used_at is not None
