from __future__ import annotations

from datetime import datetime

from django.contrib.auth.models import Group
from django.db import transaction
from django.utils import timezone

from labbook.accounts.models import ApiToken, hash_token
from labbook.accounts.permissions import LAB_GROUPS, MANAGERS, MEMBERS


@transaction.atomic
def mint_token(
    user,
    *,
    label: str = "",
    instrument=None,
    read_only: bool = False,
    expires_at: datetime | None = None,
) -> tuple[ApiToken, str]:
    """Create a token for ``user``; returns the row and the raw token, which is never stored."""
    raw = ApiToken.new_raw_token()
    token = ApiToken.objects.create(
        user=user,
        label=label,
        token_hash=hash_token(raw),
        hint=raw[:10],
        instrument=instrument,
        read_only=read_only,
        expires_at=expires_at,
    )
    return token, raw


def revoke_token(token: ApiToken) -> None:
    ApiToken.objects.filter(pk=token.pk, revoked_at__isnull=True).update(revoked_at=timezone.now())


def ensure_lab_groups() -> dict[str, Group]:
    return {name: Group.objects.get_or_create(name=name)[0] for name in LAB_GROUPS}


@transaction.atomic
def set_role(user, role: str) -> None:
    """Put ``user`` in the members group, and in managers too when ``role`` is manager."""
    groups = ensure_lab_groups()
    if role not in ("member", "manager", "outsider"):
        raise ValueError(f"unknown role {role!r}: use member, manager or outsider")
    user.groups.remove(groups[MEMBERS], groups[MANAGERS])
    if role in ("member", "manager"):
        user.groups.add(groups[MEMBERS])
    if role == "manager":
        user.groups.add(groups[MANAGERS])
    # Managers use the setup pages (the admin); nobody else needs staff status.
    if not user.is_superuser and user.is_staff != (role == "manager"):
        user.is_staff = role == "manager"
        user.save(update_fields=["is_staff"])
    user._labbook_groups = None
