"""The benchmarks of each part of labbook; later issues add theirs here."""

from __future__ import annotations

from django.contrib.auth import get_user_model
from django.db import connection
from django.test import Client, RequestFactory

from labbook.accounts.auth import BearerToken
from labbook.bench import Figure, benchmark, p50_ms
from labbook.bench import cryo_bench as _cryo  # noqa: F401 - registers its benchmark
from labbook.bench import files as _files  # noqa: F401 - registers its benchmark
from labbook.bench import plots_bench as _plots  # noqa: F401 - registers its benchmark
from labbook.bench import provenance_bench as _provenance  # noqa: F401 - registers its benchmark
from labbook.bench import readings as _readings  # noqa: F401 - registers its benchmark
from labbook.bench import science_bench as _science  # noqa: F401 - registers its benchmark


@benchmark("api_auth")
def api_auth() -> list[Figure]:
    """An authenticated API call against the cheapest page Django serves with one query."""
    from labbook.accounts.actions import mint_token, set_role

    user, _ = get_user_model().objects.get_or_create(username="bench-member")
    set_role(user, "member")
    _, raw = mint_token(user, label="bench")
    client = Client()
    factory = RequestFactory()
    headers = {"Authorization": f"Bearer {raw}"}

    def authenticated():
        assert client.get("/api/v1/me", headers=headers).status_code == 200

    def floor():
        assert client.get("/healthz").status_code in (200, 503)

    def pk_lookup():
        with connection.cursor() as cursor:
            cursor.execute("SELECT id FROM auth_user WHERE id = %s", [user.pk])
            cursor.fetchone()

    def token_check():
        request = factory.get("/api/v1/me")
        assert BearerToken().authenticate(request, raw) is not None

    floor_ms = p50_ms(floor)
    token_ms = p50_ms(authenticated)
    lookup_ms = p50_ms(pk_lookup, repeat=2000)
    check_ms = p50_ms(token_check, repeat=2000)
    return [
        Figure(
            "GET /api/v1/me with a bearer token, p50",
            token_ms,
            "ms",
            floor_ms,
            "GET /healthz: a plain Django view with SELECT 1",
        ),
        Figure(
            "token check (hash, lookup, lab membership), p50",
            check_ms,
            "ms",
            lookup_ms,
            "one primary-key SELECT on the same connection",
        ),
    ]
