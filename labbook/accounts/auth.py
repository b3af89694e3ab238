"""API authentication: a bearer token (scripts) or the browser's session (pages' htmx calls).

``request.auth`` is an ``Access``: the user, and the token with its limits when one was used.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import timedelta

from django.utils import timezone
from ninja.errors import HttpError
from ninja.security import APIKeyCookie, HttpBearer

from labbook.accounts.models import ApiToken, hash_token
from labbook.accounts.permissions import (
    PermissionDenied,
    is_lab_member,
    is_manager,
    lab_groups_annotation,
    remember_lab_groups,
)

SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
# Writing last_used_at on every request would turn every read into a write.
_LAST_USED_RESOLUTION = timedelta(minutes=5)


@dataclass(frozen=True)
class Access:
    user: object
    token: ApiToken | None = None

    @property
    def read_only(self) -> bool:
        return bool(self.token and self.token.read_only)

    @property
    def instrument_id(self) -> int | None:
        return self.token.instrument_id if self.token else None

    def require_write(self, instrument_id: int | None = None) -> None:
        """Raise unless this caller may change a record (of ``instrument_id`` when given).

        An instrument-scoped token writes only its instrument's records, and nothing that
        belongs to no instrument.
        """
        if self.read_only:
            raise PermissionDenied("this token is read-only")
        scoped_to = self.token.instrument_id if self.token is not None else None
        if scoped_to is not None and instrument_id != scoped_to:
            raise PermissionDenied(
                f"this token may write only records of instrument {self.token.instrument_id}"
            )

    def require_write_any(self) -> None:
        """Raise unless this caller may write at all (per-record scope is checked later)."""
        if self.read_only:
            raise PermissionDenied("this token is read-only")

    def require_manager(self) -> None:
        self.require_write()
        if self.token is not None and self.token.instrument_id is not None:
            raise PermissionDenied("an instrument-scoped token cannot do lab-wide changes")
        if not is_manager(self.user):
            raise PermissionDenied("only lab managers may do this")


def _admit(user) -> None:
    if not is_lab_member(user):
        raise HttpError(403, "this account is not a member of the lab")


class BearerToken(HttpBearer):
    def authenticate(self, request, token: str) -> Access | None:
        found = (
            ApiToken.objects.active()
            .select_related("user")
            .annotate(**lab_groups_annotation("user"))
            .filter(token_hash=hash_token(token))
            .first()
        )
        if found is None:
            return None
        remember_lab_groups(found.user, found)
        _admit(found.user)
        if found.read_only and request.method not in SAFE_METHODS:
            raise HttpError(403, "this token is read-only")
        now = timezone.now()
        if found.last_used_at is None or now - found.last_used_at > _LAST_USED_RESOLUTION:
            ApiToken.objects.filter(pk=found.pk).update(last_used_at=now)
        request.user = found.user
        return Access(user=found.user, token=found)


class LabSession(APIKeyCookie):
    """The browser's login session; CSRF is checked on every unsafe method."""

    param_name = "sessionid"

    def __init__(self) -> None:
        from django.conf import settings

        self.param_name = settings.SESSION_COOKIE_NAME
        super().__init__(csrf=True)

    def __call__(self, request) -> Access | None:
        # No session, no CSRF question: the caller is simply unauthenticated (401, not 403).
        user = getattr(request, "user", None)
        if user is None or not user.is_authenticated:
            return None
        return super().__call__(request)

    def authenticate(self, request, key: str | None) -> Access | None:
        _admit(request.user)
        return Access(user=request.user)


def docs_access_required(view):
    """The OpenAPI document and its browser need the same access as the API itself: a lab
    member's session or a valid bearer token (schema-driven test tools send one)."""
    from functools import wraps

    from django.contrib.auth.views import redirect_to_login
    from django.http import JsonResponse

    bearer = BearerToken()

    @wraps(view)
    def wrapped(request, *args, **kwargs):
        user = getattr(request, "user", None)
        header = request.headers.get("Authorization", "")
        if header.lower().startswith("bearer "):
            try:
                access = bearer.authenticate(request, header.split(" ", 1)[1].strip())
            except HttpError as exc:
                return JsonResponse({"detail": str(exc)}, status=exc.status_code)
            user = access.user if access else None
        if user is None or not user.is_authenticated:
            if request.path.endswith(".json"):
                return JsonResponse(
                    {"detail": "authentication required: a bearer token or a login session"},
                    status=401,
                )
            return redirect_to_login(request.get_full_path())
        if not is_lab_member(user):
            return JsonResponse({"detail": "this account is not a member of the lab"}, status=403)
        return view(request, *args, **kwargs)

    return wrapped
