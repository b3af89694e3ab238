"""The bearer-token lookup runs SQL compiled once per process (labbook.core.compiled): it must
answer exactly what the ORM answers for the same token, every time, with fresh values."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.contrib.auth.models import Group
from django.utils import timezone

from labbook.accounts.actions import mint_token
from labbook.accounts.auth import active_token
from labbook.accounts.models import ApiToken
from labbook.accounts.permissions import LAB_GROUPS, _group_names
from labbook.core.compiled import CompiledQuery

pytestmark = pytest.mark.django_db


def test_the_token_and_its_user_are_what_the_orm_reads(member, manager, instrument):
    _, raw_member = mint_token(member, label="chamber PC")
    token, raw_manager = mint_token(manager, label="scoped", instrument=instrument, read_only=True)
    for raw, user in ((raw_member, member), (raw_manager, manager)):
        found = active_token(raw)
        stored = ApiToken.objects.select_related("user").get(token_hash=found.token_hash)
        for field in ApiToken._meta.concrete_fields:
            assert getattr(found, field.attname) == getattr(stored, field.attname), field.name
        for field in type(user)._meta.concrete_fields:
            assert getattr(found.user, field.attname) == getattr(stored.user, field.attname)
        # Datetimes come back aware on every backend, as the ORM gives them.
        assert timezone.is_aware(found.created_at) and timezone.is_aware(found.user.date_joined)
        groups = set(user.groups.filter(name__in=LAB_GROUPS).values_list("name", flat=True))
        assert _group_names(found.user) == groups and groups
    assert active_token(raw_manager).instrument_id == instrument.pk
    assert active_token(raw_manager).read_only is True


def test_revoked_expired_and_unknown_tokens_are_not_found(member):
    token, raw = mint_token(member)
    assert active_token(raw) is not None
    assert active_token(raw + "x") is None
    ApiToken.objects.filter(pk=token.pk).update(expires_at=timezone.now() - timedelta(seconds=1))
    assert active_token(raw) is None
    ApiToken.objects.filter(pk=token.pk).update(expires_at=timezone.now() + timedelta(hours=1))
    assert active_token(raw) is not None
    ApiToken.objects.filter(pk=token.pk).update(revoked_at=timezone.now())
    assert active_token(raw) is None


def test_a_group_change_is_seen_on_the_next_request(member):
    _, raw = mint_token(member)
    before = _group_names(active_token(raw).user)
    member.groups.clear()
    assert before and _group_names(active_token(raw).user) == set()
    member.groups.add(Group.objects.get(name=sorted(before)[0]))
    assert _group_names(active_token(raw).user) == {sorted(before)[0]}


def test_a_placeholder_that_is_not_one_parameter_is_refused(member):
    twice = CompiledQuery(
        lambda name: ApiToken.objects.filter(label=name, hint=name).values("id"),
        {"name": "placeholder"},
    )
    with pytest.raises(ValueError, match="appears 2 times"):
        twice.rows(name="x")
