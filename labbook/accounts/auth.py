"""API authentication: a bearer token (scripts) or the browser's session (pages' htmx calls).

``request.auth`` is an ``Access``: the user, and the token with its limits when one was used.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import cache
from types import SimpleNamespace

from django.contrib.auth import get_user_model
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
from labbook.core.compiled import CompiledQuery

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


@cache
def _token_fields() -> tuple[str, ...]:
    return tuple(f.attname for f in ApiToken._meta.concrete_fields)


@cache
def _user_fields() -> tuple[str, ...]:
    return tuple(f.attname for f in get_user_model()._meta.concrete_fields)


def _active_token_query(token_hash: str, now: datetime):
    """The active token of a hash, with its user's columns and lab groups, in one row."""
    groups = lab_groups_annotation("user")
    return (
        ApiToken.objects.active(now)
        .filter(token_hash=token_hash)
        .annotate(**groups)
        .values(*_token_fields(), *(f"user__{name}" for name in _user_fields()), *groups)
    )


# Every API call looks its token up: compiled once, as CompiledQuery explains.
_ACTIVE_TOKEN = CompiledQuery(
    _active_token_query,
    {
        "token_hash": "placeholder: no SHA-256 looks like this",
        "now": datetime(1901, 2, 3, 4, 5, 6, 7, tzinfo=UTC),
    },
)


def active_token(raw: str) -> ApiToken | None:
    """The active token of a raw bearer value, with its user and the user's lab groups."""
    rows = _ACTIVE_TOKEN.rows(token_hash=hash_token(raw), now=timezone.now())
    if not rows:
        return None
    row = rows[0]
    token_fields, user_fields = _token_fields(), _user_fields()
    token = ApiToken.from_db("default", token_fields, [row[name] for name in token_fields])
    user = get_user_model().from_db(
        "default", user_fields, [row[f"user__{name}"] for name in user_fields]
    )
    token.user = user
    remember_lab_groups(user, SimpleNamespace(**row))
    return token


class BearerToken(HttpBearer):
    def authenticate(self, request, token: str) -> Access | None:
        found = active_token(token)
        if found is None:
            return None
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
