"""Who may do what. Two groups: members (read and log their work) and managers (also set up
instruments, cryostats and people). A logged-in account in neither group is an outsider and
sees nothing."""

from __future__ import annotations

from typing import Any

from django.contrib.auth.models import AnonymousUser, Group
from django.db.models import Exists, OuterRef

MEMBERS = "members"
MANAGERS = "managers"
LAB_GROUPS = (MEMBERS, MANAGERS)


class PermissionDenied(Exception):  # noqa: N818 - reads as a sentence at the raise site
    """Raised by a permission check; the API answers 403 and pages answer 403."""


def lab_groups_annotation(user_field: str) -> dict[str, Any]:
    """Annotations that tell, in the query that fetches a user (``user_field`` names the user
    column, e.g. ``"user"``), which lab groups the user is in; :func:`remember_lab_groups`
    then spares the permission checks a query of their own (one round trip a request)."""
    return {
        f"_in_{name}": Exists(Group.objects.filter(user=OuterRef(user_field), name=name))
        for name in LAB_GROUPS
    }


def remember_lab_groups(user, annotated) -> None:
    """Keep the groups read by :func:`lab_groups_annotation` on ``user`` for the checks."""
    user._labbook_groups = {name for name in LAB_GROUPS if getattr(annotated, f"_in_{name}")}


def _group_names(user) -> set[str]:
    """The user's lab groups (only those: no check asks about another), read once."""
    cached = getattr(user, "_labbook_groups", None)
    if cached is None:
        cached = (
            set(user.groups.filter(name__in=LAB_GROUPS).values_list("name", flat=True))
            if user.is_authenticated
            else set()
        )
        user._labbook_groups = cached
    return cached


def is_manager(user) -> bool:
    return bool(
        user and user.is_authenticated and (user.is_superuser or MANAGERS in _group_names(user))
    )


def is_lab_member(user) -> bool:
    if user is None or isinstance(user, AnonymousUser) or not user.is_authenticated:
        return False
    return user.is_active and (user.is_superuser or bool(_group_names(user) & set(LAB_GROUPS)))


def require_member(user) -> None:
    if not is_lab_member(user):
        raise PermissionDenied("this account is not a member of the lab")


def require_manager(user) -> None:
    if not is_manager(user):
        raise PermissionDenied("only lab managers may do this")


def lab_member_required(view):
    """Page decorator: a logged-in account outside the lab gets 403, not the page."""
    from functools import wraps

    from django.core.exceptions import PermissionDenied as PageDenied

    @wraps(view)
    def wrapped(request, *args, **kwargs):
        if not is_lab_member(request.user):
            raise PageDenied("this account is not a member of the lab")
        return view(request, *args, **kwargs)

    return wrapped
