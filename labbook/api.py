"""The JSON API under /api/v1/ (DESIGN.md §4): authentication, one error format, the routers.

Errors always answer ``{"detail": "<what went wrong>", "errors": [{"field", "message"}]}``;
``errors`` is present when specific fields are at fault.
"""

from __future__ import annotations

import errno

from django.core.exceptions import ObjectDoesNotExist
from django.core.exceptions import ValidationError as DjangoValidationError
from django.db import DatabaseError, DataError, IntegrityError
from ninja import NinjaAPI
from ninja.errors import AuthenticationError, HttpError
from ninja.errors import ValidationError as NinjaValidationError

from labbook.accounts.auth import BearerToken, LabSession, docs_access_required
from labbook.accounts.permissions import PermissionDenied
from labbook.samples.steps import StepErrors
from labbook.science.errors import ScienceInputError

api = NinjaAPI(
    title="labbook API",
    version="1",
    description="The lab record of UHV low-temperature scanning-probe microscopes. "
    "Send `Authorization: Bearer <token>` (see `manage.py mint_token`) or use the browser session.",
    auth=[BearerToken(), LabSession()],
    urls_namespace="api",
    docs_url="/docs",
    docs_decorator=docs_access_required,
)


def _error(request, status: int, detail: str, errors: list[dict] | None = None):
    body: dict = {"detail": detail}
    if errors:
        body["errors"] = errors
    return api.create_response(request, body, status=status)


@api.exception_handler(NinjaValidationError)
def _invalid_input(request, exc: NinjaValidationError):
    errors = []
    for item in exc.errors:
        location = [str(part) for part in item.get("loc", ()) if part not in ("body", "payload")]
        errors.append({"field": ".".join(location), "message": item.get("msg", "invalid")})
    return _error(request, 422, "the request has invalid fields", errors)


@api.exception_handler(DjangoValidationError)
def _invalid_record(request, exc: DjangoValidationError):
    if hasattr(exc, "error_dict"):
        errors = [
            {"field": field, "message": " ".join(m for e in errs for m in e.messages)}
            for field, errs in exc.error_dict.items()
        ]
    else:
        errors = [{"field": "", "message": m} for m in exc.messages]
    return _error(request, 422, "the record is not valid", errors)


@api.exception_handler(StepErrors)
def _bad_steps(request, exc: StepErrors):
    errors = [{"field": field, "message": message} for field, message in exc.errors.items()]
    return _error(request, 422, "the request has invalid fields", errors)


@api.exception_handler(ScienceInputError)
def _bad_quantity(request, exc: ScienceInputError):
    field = getattr(exc, "field", None) or exc.argument or ""
    return _error(
        request, 422, "the request has invalid fields", [{"field": field, "message": str(exc)}]
    )


@api.exception_handler(AuthenticationError)
def _unauthenticated(request, exc):
    return _error(request, 401, "authentication required: a bearer token or a login session")


@api.exception_handler(PermissionDenied)
def _forbidden(request, exc: PermissionDenied):
    return _error(request, 403, str(exc))


@api.exception_handler(HttpError)
def _http_error(request, exc: HttpError):
    return _error(request, exc.status_code, str(exc))


@api.exception_handler(ObjectDoesNotExist)
def _not_found(request, exc):
    return _error(request, 404, str(exc) or "not found")


@api.exception_handler(IntegrityError)
def _conflict(request, exc):
    return _error(request, 409, "this conflicts with an existing record")


@api.exception_handler(OverflowError)
@api.exception_handler(DataError)
def _out_of_range(request, exc):
    # An id or number beyond what the database stores (e.g. past 64 bits) is bad input, not an
    # outage: SQLite raises OverflowError, PostgreSQL DataError.
    return _error(
        request,
        422,
        "the request has a value out of range for the database (ids and counts fit in 64 bits)",
    )


@api.exception_handler(DatabaseError)
def _database_unavailable(request, exc):
    # A restarting database must give a clear, retryable answer, never a half-written record.
    response = _error(request, 503, "the database is unavailable; retry shortly")
    response["Retry-After"] = "5"
    return response


@api.exception_handler(OSError)
def _volume_full(request, exc: OSError):
    # A full files volume must say so; any other OS error stays a 500.
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return _error(
            request,
            507,
            "the files volume is full: nothing was stored; free space and send the file again",
        )
    raise exc


def _mount_routers() -> None:
    from labbook.accounts.api import router as accounts_router
    from labbook.cryo.api import router as cryo_router
    from labbook.datafiles.api import router as datafiles_router
    from labbook.instruments.api import router as instruments_router
    from labbook.logbook.api import router as logbook_router
    from labbook.provenance.api import router as provenance_router
    from labbook.samples.api import router as samples_router
    from labbook.tips.api import router as tips_router

    api.add_router("/", instruments_router)
    api.add_router("/", samples_router)
    api.add_router("/", logbook_router)
    api.add_router("/", tips_router)
    api.add_router("/", datafiles_router)
    api.add_router("/", accounts_router)
    api.add_router("/", provenance_router)
    api.add_router("/", cryo_router)


_mount_routers()
