"""Who may call what, for EVERY API operation and EVERY page, enumerated from the code.

API operations come from the OpenAPI document of ``labbook.api.api``; pages from Django's URL
resolver. Each is classified by rule (method + path, with explicit lists for the exceptions),
and each class has an expected outcome per role (DEVELOPERS.md, "Permissions"). An operation
or page the rules cannot classify, or whose path parameters or request body this test cannot
fill, fails ``test_every_endpoint_and_page_has_an_expectation`` by name: give it an
expectation here before it ships.

Every request runs in a savepoint that is rolled back, so each (operation, role) pair meets
the same records and a write that should have been refused cannot hide a later one.
"""

from __future__ import annotations

import io
import json
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any
from urllib.parse import urlencode

import numpy as np
import pytest
from django.db import transaction
from django.test import Client
from django.urls import URLPattern, URLResolver, get_resolver
from django.utils import timezone

from labbook.accounts.actions import mint_token

pytestmark = pytest.mark.django_db

API = "/api/v1"
SAFE = {"GET", "HEAD", "OPTIONS"}

# --- classes of endpoint ---------------------------------------------------------------------

READ = "read"  # any lab member or token
READ_BY_POST = "read-by-post"  # a read sent as POST (a body too long for a query string)
WRITE = "write"  # members; a scoped token only on its own instrument's records
WRITE_LAB_WIDE = "write-lab-wide"  # members; records of no instrument: no scoped token
MANAGER = "manager"  # lab-wide setup: managers only, never through a scoped token

#: Lab-wide setup (DEVELOPERS.md: instruments, cryostats, people; deposition sources are
#: part of an instrument's fixed setup and the action requires a manager).
MANAGER_ONLY = {
    ("POST", "/instruments"),
    ("POST", "/cryostats"),
    ("POST", "/deposition-sources"),
}
#: POST operations that change nothing: what they answer is a read.
READS_BY_POST = {("POST", "/crates")}
#: Writes of records that belong to no instrument (an instrument token may not make them).
LAB_WIDE_WRITES = {
    ("POST", "/samples"),
    ("POST", "/recipes"),
    ("POST", "/recipes/{recipe_id}/revisions"),
    ("POST", "/tips"),
}


def classify(method: str, path: str) -> str:
    if (method, path) in MANAGER_ONLY:
        return MANAGER
    if (method, path) in READS_BY_POST:
        return READ_BY_POST
    if method in SAFE:
        return READ
    if (method, path) in LAB_WIDE_WRITES:
        return WRITE_LAB_WIDE
    return WRITE


# --- roles -----------------------------------------------------------------------------------

ANONYMOUS = "anonymous"
OUTSIDER = "outsider token"
OUTSIDER_SESSION = "outsider session"
MEMBER = "member token"
MEMBER_SESSION = "member session"
MANAGER_TOKEN = "manager token"
READ_ONLY = "read-only token"
SCOPED_OTHER = "token scoped to another instrument"
SCOPED_OWN = "token scoped to this instrument"
MANAGER_SCOPED_OTHER = "manager token scoped to another instrument"

API_ROLES = [
    ANONYMOUS,
    OUTSIDER,
    OUTSIDER_SESSION,
    MEMBER,
    MEMBER_SESSION,
    MANAGER_TOKEN,
    READ_ONLY,
    SCOPED_OTHER,
    SCOPED_OWN,
    MANAGER_SCOPED_OTHER,
]

OK = "2xx"
ROWS_REJECTED = "200, every row rejected"


def _row(**overrides: object) -> dict[str, object]:
    base = {
        ANONYMOUS: 401,
        OUTSIDER: 403,
        OUTSIDER_SESSION: 403,
        MEMBER: OK,
        MEMBER_SESSION: OK,
        MANAGER_TOKEN: OK,
        READ_ONLY: OK,
        SCOPED_OTHER: OK,
        SCOPED_OWN: OK,
        MANAGER_SCOPED_OTHER: OK,
    }
    base.update({ROLE_KEYS[k]: v for k, v in overrides.items()})
    return base


ROLE_KEYS = {
    "read_only": READ_ONLY,
    "scoped_other": SCOPED_OTHER,
    "scoped_own": SCOPED_OWN,
    "manager_scoped_other": MANAGER_SCOPED_OTHER,
    "member": MEMBER,
    "member_session": MEMBER_SESSION,
}

EXPECTED: dict[str, dict[str, object]] = {
    READ: _row(),
    READ_BY_POST: _row(read_only=403),
    WRITE: _row(read_only=403, scoped_other=403, manager_scoped_other=403),
    WRITE_LAB_WIDE: _row(read_only=403, scoped_other=403, scoped_own=403, manager_scoped_other=403),
    MANAGER: _row(
        member=403,
        member_session=403,
        read_only=403,
        scoped_other=403,
        scoped_own=403,
        manager_scoped_other=403,
    ),
}
#: Where one operation answers a class's refusal its own way.
EXPECTED_OVERRIDES: dict[tuple[str, str, str], object] = {
    # A batch of readings is judged row by row: the other instrument's rows are rejected
    # with their index and reason while the batch itself is accepted (instruments/readings).
    ("POST", "/readings", SCOPED_OTHER): ROWS_REJECTED,
    ("POST", "/readings", MANAGER_SCOPED_OTHER): ROWS_REJECTED,
}


# --- the records every request meets ----------------------------------------------------------

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
ANNEAL = {"kind": "anneal", "temperature_k": "800 K", "duration_s": "15 min", "cleans": True}


def npy_bytes(seed: int, n: int = 16) -> bytes:
    buffer = io.BytesIO()
    data = np.random.default_rng(seed).standard_normal((n, n)).astype(np.float32) * 1e-10
    np.save(buffer, data, allow_pickle=False)
    return buffer.getvalue()


@dataclass
class World:
    manager: Any
    member: Any
    outsider: Any
    instrument: Any
    other_instrument: Any
    channel: Any
    level_channel: Any
    other_level_channel: Any
    sample: Any
    recipe: Any
    source: Any
    tip_free: Any
    tip_mounted: Any
    mount: Any
    session: Any
    file: Any
    cryostat: Any
    alert: Any
    event: Any
    preparation: Any
    extra: dict = field(default_factory=dict)


@pytest.fixture
def world(
    manager,
    member,
    outsider,
    instrument,
    other_instrument,
    settings,
    tmp_path,
    django_capture_on_commit_callbacks,
) -> World:
    from labbook.cryo import actions as cryo
    from labbook.datafiles.actions import ingest
    from labbook.demo.instruments import insert_readings
    from labbook.instruments.actions import create_channel, record_event
    from labbook.logbook.actions import start_session
    from labbook.samples import actions as samples
    from labbook.tips import actions as tips

    settings.MEDIA_ROOT = str(tmp_path / "files")
    channel = create_channel(
        instrument, name="prep gauge", quantity="pressure", unit="mbar", actor=manager
    )
    level = create_channel(
        instrument, name="LHe level", quantity="cryogen_level", unit="%", actor=manager
    )
    other_level = create_channel(
        other_instrument, name="LHe level", quantity="cryogen_level", unit="%", actor=manager
    )
    sample = samples.create_sample(name="Cu(111) #1", substrate="Cu(111)", actor=member)
    recipe = samples.create_recipe(name="anneal Cu", steps=[ANNEAL], actor=member)
    source = samples.add_deposition_source(
        instrument, name="K-cell 1", material="Ag", actor=manager
    )
    tip_free = tips.create_tip(name="W-free", material="W", actor=member)
    tip_mounted = tips.create_tip(name="W-mounted", material="W", actor=member)
    mount = tips.mount_tip(
        tip_mounted, instrument, start=T0 - timedelta(days=2), actor=member
    ).mount
    session = start_session(instrument, start=T0 - timedelta(hours=1), actor=member)
    with django_capture_on_commit_callbacks(execute=True):
        ingested = ingest(
            io.BytesIO(npy_bytes(1)),
            "scan-1.npy",
            metadata={"kind": "topograph", "acquired_at": T0.isoformat()},
            actor=member,
            instrument=instrument,
        )
    cryostat = cryo.create_cryostat(
        instrument,
        level_channel=level,
        actor=manager,
        name="LHe bath",
        cryogen="LHe",
        capacity_l=12.0,
        minimum_l=1.5,
    )
    alerts = cryo.check_alerts(cryostat, notify=False)
    assert alerts, "a cryostat with no level readings should have a stale-level alert"
    # Then ten days of level readings, so that its forecast and plan have data: 3 L/day
    # boil-off from a 12 L bath, refilled to 95 % every 2.5 days (invented, round numbers).
    end_s = int(timezone.now().timestamp()) // 1800 * 1800
    t_s = np.arange(end_s - 10 * 86400, end_s + 1, 1800, dtype=np.int64)
    days_since_fill = ((t_s - t_s[0]) / 86400.0) % 2.5
    insert_readings(level.pk, t_s, 95.0 - 3.0 / 12.0 * 100.0 * days_since_fill)
    event = record_event(instrument, kind="bakeout", start=T0 - timedelta(days=5), actor=member)
    preparation = samples.record_preparation(
        sample=sample,
        instrument=instrument,
        started_at=T0 - timedelta(hours=3),
        steps=[ANNEAL],
        actor=member,
    )
    file = ingested.file
    file.refresh_from_db()
    assert file.status == "ready", file.error
    return World(
        manager=manager,
        member=member,
        outsider=outsider,
        instrument=instrument,
        other_instrument=other_instrument,
        channel=channel,
        level_channel=level,
        other_level_channel=other_level,
        sample=sample,
        recipe=recipe,
        source=source,
        tip_free=tip_free,
        tip_mounted=tip_mounted,
        mount=mount,
        session=session,
        file=file,
        cryostat=cryostat,
        alert=alerts[0],
        event=event,
        preparation=preparation,
    )


# --- how to fill an operation -------------------------------------------------------------------

#: Path parameters of the API by name.
API_PARAMS: dict[str, Callable[[World], int]] = {
    "instrument_id": lambda w: w.instrument.pk,
    "channel_id": lambda w: w.channel.pk,
    "sample_id": lambda w: w.sample.pk,
    "recipe_id": lambda w: w.recipe.pk,
    "source_id": lambda w: w.source.pk,
    "preparation_id": lambda w: w.preparation.pk,
    "session_id": lambda w: w.session.pk,
    "tip_id": lambda w: w.tip_mounted.pk,
    "mount_id": lambda w: w.mount.pk,
    "file_id": lambda w: w.file.pk,
    "cryostat_id": lambda w: w.cryostat.pk,
    "alert_id": lambda w: w.alert.pk,
}

#: Required query parameters of reads, by path.
API_QUERIES: dict[str, Callable[[World], dict[str, str]]] = {
    "/channels/{channel_id}/readings": lambda w: {
        "since": (T0 - timedelta(days=1)).isoformat(),
        "until": T0.isoformat(),
    },
    "/crates.zip": lambda w: {"ids": str(w.file.pk)},
}


@dataclass
class Body:
    json: Any = None
    multipart: dict | None = None
    path_params: dict[str, int] = field(default_factory=dict)


def _upload(w: World) -> Body:
    upload = io.BytesIO(npy_bytes(7))
    upload.name = "scan-7.npy"
    metadata = {"kind": "topograph", "instrument": w.instrument.pk, "acquired_at": T0.isoformat()}
    return Body(multipart={"file": upload, "metadata": json.dumps(metadata)})


#: A valid body for every unsafe operation; writes aim at ``w.instrument``, which the
#: "scoped to another instrument" tokens may not touch.
API_BODIES: dict[tuple[str, str], Callable[[World], Body]] = {
    ("POST", "/instruments"): lambda w: Body({"name": "LTM-V"}),
    ("POST", "/channels"): lambda w: Body(
        {"instrument": w.instrument.pk, "name": "new gauge", "quantity": "pressure", "unit": "mbar"}
    ),
    ("POST", "/readings"): lambda w: Body(
        [{"channel": w.channel.pk, "t": T0.isoformat(), "value": "2e-10 mbar"}]
    ),
    ("POST", "/samples"): lambda w: Body({"name": "Au(111) #9", "substrate": "Au(111)"}),
    ("POST", "/samples/{sample_id}/transfers"): lambda w: Body(
        {"location": "microscope_stage", "at": T0.isoformat(), "instrument": w.instrument.pk}
    ),
    ("POST", "/recipes"): lambda w: Body({"name": "anneal Au", "steps": [ANNEAL]}),
    ("POST", "/recipes/{recipe_id}/revisions"): lambda w: Body({"description": "longer"}),
    ("POST", "/deposition-sources"): lambda w: Body(
        {"instrument": w.instrument.pk, "name": "K-cell 2", "material": "NaCl"}
    ),
    ("POST", "/deposition-sources/{source_id}/calibrations"): lambda w: Body(
        {
            "points": [
                {"duration_s": "10 min", "coverage_ml": 0.5},
                {"duration_s": "20 min", "coverage_ml": 1.1},
            ],
            "measured_at": T0.isoformat(),
        }
    ),
    ("POST", "/preparations"): lambda w: Body(
        {
            "sample": w.sample.pk,
            "instrument": w.instrument.pk,
            "started_at": (T0 - timedelta(hours=2)).isoformat(),
            "steps": [ANNEAL],
        }
    ),
    ("POST", "/sessions"): lambda w: Body(
        {
            "instrument": w.instrument.pk,
            "start": (T0 - timedelta(days=3)).isoformat(),
            "end": (T0 - timedelta(days=3) + timedelta(hours=2)).isoformat(),
        }
    ),
    ("POST", "/sessions/{session_id}/end"): lambda w: Body({"summary": "done"}),
    ("POST", "/notes"): lambda w: Body({"text": "tip changed", "instrument": w.instrument.pk}),
    ("POST", "/tips"): lambda w: Body({"name": "PtIr-3", "material": "PtIr"}),
    ("POST", "/tips/{tip_id}/mounts"): lambda w: Body(
        {"instrument": w.instrument.pk, "start": (T0 - timedelta(hours=1)).isoformat()},
        path_params={"tip_id": w.tip_free.pk},
    ),
    ("POST", "/tips/{tip_id}/mounts/{mount_id}/end"): lambda w: Body({}),
    ("POST", "/tips/{tip_id}/conditioning"): lambda w: Body(
        {"kind": "field_emission", "at": (T0 - timedelta(days=1)).isoformat()}
    ),
    ("POST", "/files"): _upload,
    ("POST", "/files/{file_id}/corrections"): lambda w: Body({"bias_v": 0.5}),
    ("POST", "/crates"): lambda w: Body({"ids": [w.file.pk], "name": "Figure 2"}),
    ("POST", "/cryostats"): lambda w: Body(
        {
            "instrument": w.other_instrument.pk,
            "cryogen": "LHe",
            "capacity_l": "12 L",
            "minimum_l": 1.5,
            "level_channel": w.other_level_channel.pk,
        }
    ),
    ("POST", "/cryostats/alerts/{alert_id}/acknowledge"): lambda w: Body(None),
    ("POST", "/cryostats/{cryostat_id}/refills"): lambda w: Body(
        {"at": (T0 - timedelta(hours=5)).isoformat(), "transferred_l": 8}
    ),
}


@dataclass(frozen=True)
class Operation:
    method: str
    path: str  # without the /api/v1 prefix, as in the OpenAPI document
    required_query: tuple[str, ...]

    @property
    def params(self) -> list[str]:
        return re.findall(r"{(\w+)}", self.path)


def api_operations() -> list[Operation]:
    from labbook.api import api

    found = []
    for path, ops in api.get_openapi_schema()["paths"].items():
        for method, op in ops.items():
            required = tuple(
                p["name"]
                for p in op.get("parameters", [])
                if p.get("in") == "query" and p.get("required")
            )
            found.append(Operation(method.upper(), path.removeprefix(API), required))
    return found


def unfillable(op: Operation) -> str | None:
    """Why this test cannot call ``op`` with a request that should succeed, if it cannot."""
    missing = [p for p in op.params if p not in API_PARAMS]
    if missing:
        return f"no fixture id for path parameter(s) {missing}"
    if op.method not in SAFE and (op.method, op.path) not in API_BODIES:
        return "no request body known (add one to API_BODIES and classify it)"
    if op.required_query and op.path not in API_QUERIES:
        return f"no values for required query parameter(s) {list(op.required_query)}"
    return None


# --- clients -------------------------------------------------------------------------------------


def _token_client(user, **limits) -> tuple[Client, dict[str, str]]:
    _, raw = mint_token(user, **limits)
    return Client(), {"Authorization": f"Bearer {raw}"}


def _session_client(user) -> tuple[Client, dict[str, str]]:
    client = Client()
    client.force_login(user)
    return client, {}


def api_client(role: str, w: World) -> tuple[Client, dict[str, str]]:
    return {
        ANONYMOUS: lambda: (Client(), {}),
        OUTSIDER: lambda: _token_client(w.outsider),
        OUTSIDER_SESSION: lambda: _session_client(w.outsider),
        MEMBER: lambda: _token_client(w.member),
        MEMBER_SESSION: lambda: _session_client(w.member),
        MANAGER_TOKEN: lambda: _token_client(w.manager),
        READ_ONLY: lambda: _token_client(w.member, read_only=True),
        SCOPED_OTHER: lambda: _token_client(w.member, instrument=w.other_instrument),
        SCOPED_OWN: lambda: _token_client(w.member, instrument=w.instrument),
        MANAGER_SCOPED_OTHER: lambda: _token_client(w.manager, instrument=w.other_instrument),
    }[role]()


@dataclass
class Answer:
    status: int
    body: bytes
    location: str = ""

    def json(self) -> Any:
        try:
            return json.loads(self.body)
        except ValueError:
            return None


def _settle(response) -> Answer:
    if getattr(response, "streaming", False):
        body = b"".join(response.streaming_content)
    else:
        body = response.content
    # No response.close() here: the test client closed it already, and a second close fires
    # request_finished, whose connection check closes the database inside our savepoint.
    return Answer(response.status_code, body, response.get("Location", ""))


def call_api(client: Client, headers: dict, op: Operation, w: World) -> Answer:
    body = API_BODIES[(op.method, op.path)](w) if op.method not in SAFE else Body()
    values = {name: API_PARAMS[name](w) for name in op.params} | body.path_params
    url = API + op.path.format(**values)
    with transaction.atomic():
        if op.method in SAFE:
            query = API_QUERIES[op.path](w) if op.required_query else {}
            response = (
                client.generic(op.method, url, headers=headers)
                if not query
                else (client.get(url, query, headers=headers))
            )
        elif body.multipart is not None:
            response = client.post(url, body.multipart, headers=headers)
        else:
            payload = b"" if body.json is None else json.dumps(body.json)
            response = client.generic(
                op.method, url, payload, content_type="application/json", headers=headers
            )
        answer = _settle(response)
        transaction.set_rollback(True)
    return answer


def judge(expected: object, answer: Answer) -> str | None:
    """None when the answer is what ``expected`` says, else what is wrong."""
    if expected == OK:
        if 200 <= answer.status < 300:
            return None
        return f"expected success, got {answer.status}: {answer.body[:200]!r}"
    if expected == ROWS_REJECTED:
        body = answer.json() or {}
        if answer.status == 200 and body.get("inserted") == 0 and body.get("rejected"):
            return None
        return f"expected every row rejected, got {answer.status}: {answer.body[:200]!r}"
    if answer.status != expected:
        return f"expected {expected}, got {answer.status}: {answer.body[:200]!r}"
    body = answer.json()
    if not (isinstance(body, dict) and body.get("detail")):
        return f"the refusal is not in the API error format: {answer.body[:200]!r}"
    return None


def expected_for(op: Operation, role: str) -> object:
    return EXPECTED_OVERRIDES.get(
        (op.method, op.path, role), EXPECTED[classify(op.method, op.path)][role]
    )


@pytest.mark.parametrize("role", API_ROLES)
def test_every_api_operation_answers_each_role_as_intended(role, world):
    client, headers = api_client(role, world)
    wrong = []
    for op in api_operations():
        if unfillable(op):
            continue  # reported by test_every_endpoint_and_page_has_an_expectation
        problem = judge(expected_for(op, role), call_api(client, headers, op, world))
        if problem:
            wrong.append(f"{op.method} {op.path} [{classify(op.method, op.path)}]: {problem}")
    assert not wrong, f"{role}:\n" + "\n".join(wrong)


def test_refusals_say_why(world):
    """The three token refusals name their reason, so a script's author knows what to fix."""
    write = Operation("POST", "/channels", ())
    for role, reason in (
        (READ_ONLY, "this token is read-only"),
        (SCOPED_OTHER, f"instrument {world.other_instrument.pk}"),
        (MEMBER, "only lab managers may do this"),
    ):
        client, headers = api_client(role, world)
        op = write if role != MEMBER else Operation("POST", "/instruments", ())
        answer = call_api(client, headers, op, world)
        assert answer.status == 403 and reason in answer.json()["detail"], (role, answer)


# --- pages -------------------------------------------------------------------------------------

PAGE_ROLES = [ANONYMOUS, OUTSIDER_SESSION, MEMBER_SESSION, "manager session", MEMBER]

#: ``pk`` of a page, by URL namespace; the exceptions by full URL name.
PAGE_PK_BY_NAMESPACE: dict[str, Callable[[World], int]] = {
    "cryo": lambda w: w.cryostat.pk,
    "datafiles": lambda w: w.file.pk,
    "instruments": lambda w: w.instrument.pk,
    "samples": lambda w: w.sample.pk,
    "tips": lambda w: w.tip_mounted.pk,
}


def _spectrum_dataset(w: World) -> int:
    """A spectrum with stored traces, for its plot (a topograph has none: 404), made once."""
    if "spectrum" not in w.extra:
        from django.test import TestCase

        from labbook.datafiles.actions import ingest

        buffer = io.BytesIO()
        np.savez(buffer, bias=np.linspace(-1.0, 1.0, 101), current=np.linspace(-1e-9, 1e-9, 101))
        with TestCase.captureOnCommitCallbacks(execute=True):
            made = ingest(
                io.BytesIO(buffer.getvalue()),
                "sweep.npz",
                metadata={"units": {"bias": "V", "current": "A"}},
                actor=w.member,
            )
        w.extra["spectrum"] = made.file.pk
    return w.extra["spectrum"]


# The change log's tip audit (/changes/tips/<pk>/) is about a tip.
PAGE_PARAMS_BY_NAME: dict[str, dict[str, Callable[[World], int]]] = {
    "datafiles:spectrum_plot": {"pk": _spectrum_dataset},
    "cryo:acknowledge": {"pk": lambda w: w.alert.pk},
    "instruments:event": {"pk": lambda w: w.event.pk},
    "samples:preparation": {"pk": lambda w: w.preparation.pk},
    "logbook:end_session": {"pk": lambda w: w.session.pk},
    "audit:tip": {"pk": lambda w: w.tip_mounted.pk},
    # A crate's pages are about a crate job (a finished one, so its ZIP can be downloaded).
    "provenance:crate": {"job_id": lambda w: _crate_job(w)},
    "provenance:crate_progress": {"job_id": lambda w: _crate_job(w)},
    "provenance:crate_download": {"job_id": lambda w: _crate_job(w)},
}


def _crate_job(w: World) -> int:
    """A crate job of the world's dataset, written once by its handler (as a worker would)."""
    if "crate_job" not in w.extra:
        from labbook.core.jobs import handler_for
        from labbook.core.models import Job
        from labbook.provenance.export_jobs import CRATE_JOB

        job = Job.objects.create(
            kind=CRATE_JOB, params={"ids": [w.file.pk], "name": "", "description": ""}
        )
        result = handler_for(CRATE_JOB)(job)
        Job.objects.filter(pk=job.pk).update(state=Job.State.DONE, result=result)
        w.extra["crate_job"] = job.pk
    return w.extra["crate_job"]


PAGE_PARAMS_BY_PARAM: dict[str, Callable[[World], int]] = {
    "instrument_id": lambda w: w.instrument.pk,
    "channel_id": lambda w: w.channel.pk,
}

#: The query a page needs to answer with its content (htmx parts and plots).
PAGE_QUERIES: dict[str, Callable[[World], str]] = {
    "instruments:plot": lambda w: (
        "?" + urlencode({"since": (T0 - timedelta(days=1)).isoformat(), "until": T0.isoformat()})
    ),
    "samples:log_step": lambda w: f"?add=anneal&instrument={w.instrument.pk}",
    "samples:log_steps": lambda w: f"?start=recipe:{w.recipe.pk}&instrument={w.instrument.pk}",
}

OPEN = "open"  # no login: the login form, the health probe, logging out
ADMIN = "admin"  # Django's setup pages: staff (managers) only
API_DOC = "api-doc"  # the OpenAPI document and its browser: members and tokens
MEMBER_PAGE = "member"  # everything else: lab members' pages
NOTHING = "nothing"  # ninja's root of the API: a 404 for everyone, it shows no data

NOTHING_PAGES = {"/api/v1/"}

OPEN_PAGES = {"/login/", "/healthz", "/logout/"}
API_DOC_PAGES = {"/api/v1/openapi.json", "/api/v1/docs"}


@dataclass(frozen=True)
class Page:
    route: str  # as Django spells it: /cryostats/<int:pk>/
    name: str  # namespace:name

    @property
    def params(self) -> list[str]:
        return re.findall(r"<(?:\w+:)?(\w+)>", self.route)


def _walk(patterns, prefix: str = "", namespace: str = ""):
    for entry in patterns:
        route = prefix + str(entry.pattern)
        if isinstance(entry, URLResolver):
            inner = namespace
            if entry.namespace:
                inner = f"{namespace}:{entry.namespace}" if namespace else entry.namespace
            yield from _walk(entry.url_patterns, route, inner)
        elif isinstance(entry, URLPattern):
            name = f"{namespace}:{entry.name}" if namespace else (entry.name or "")
            yield Page("/" + route, name)


def pages() -> list[Page]:
    """Every page of labbook.urls; the API's operations are checked from the OpenAPI
    document, and of the admin only its index (its inner pages are Django's own)."""
    from labbook.api import api

    schema_paths = {re.sub(r"{(\w+)}", r"<\1>", path) for path in api.get_openapi_schema()["paths"]}
    found = []
    for page in _walk(get_resolver().url_patterns):
        if page.route.startswith("/admin/") and page.route != "/admin/":
            continue
        if page.route.startswith(API + "/"):
            plain = re.sub(r"<(?:\w+:)?(\w+)>", r"<\1>", page.route)
            if plain in schema_paths:
                continue
        found.append(page)
    return found


def page_class(page: Page) -> str | None:
    if page.route in OPEN_PAGES:
        return OPEN
    if page.route == "/admin/":
        return ADMIN
    if page.route in API_DOC_PAGES:
        return API_DOC
    if page.route in NOTHING_PAGES:
        return NOTHING
    if page.route.startswith(API + "/"):
        return None  # an API route outside the OpenAPI document: classify it explicitly
    return MEMBER_PAGE


def page_param(page: Page, param: str) -> Callable[[World], int] | None:
    by_name = PAGE_PARAMS_BY_NAME.get(page.name, {})
    if param in by_name:
        return by_name[param]
    if param in PAGE_PARAMS_BY_PARAM:
        return PAGE_PARAMS_BY_PARAM[param]
    if param == "pk":
        return PAGE_PK_BY_NAMESPACE.get(page.name.split(":")[0])
    return None


def page_unfillable(page: Page) -> str | None:
    if page_class(page) is None:
        return "an API route that is not in the OpenAPI document"
    missing = [p for p in page.params if page_param(page, p) is None]
    if missing:
        return f"no fixture id for URL parameter(s) {missing} of {page.name!r}"
    return None


def page_url(page: Page, w: World) -> str:
    url = re.sub(r"<(?:\w+:)?(\w+)>", lambda m: str(page_param(page, m.group(1))(w)), page.route)
    return url + (PAGE_QUERIES[page.name](w) if page.name in PAGE_QUERIES else "")


def page_client(role: str, w: World) -> tuple[Client, dict[str, str]]:
    if role == "manager session":
        return _session_client(w.manager)
    return api_client(role, w)


def fetch(client: Client, headers: dict, method: str, url: str) -> Answer:
    with transaction.atomic():
        if method == "GET":
            response = client.get(url, headers=headers)
        else:
            response = client.post(url, {}, headers=headers)
        answer = _settle(response)
        answer.allow = response.get("Allow", "")  # type: ignore[attr-defined]
        transaction.set_rollback(True)
    return answer


def _to_login(answer: Answer, url: str) -> bool:
    return answer.status == 302 and answer.location.startswith("/login/?next=")


def judge_page(kind: str, role: str, method: str, url: str, answer: Answer) -> str | None:
    lab = role in (MEMBER_SESSION, "manager session")
    if answer.status >= 500:
        return f"server error {answer.status}"
    if kind == OPEN:
        return None
    if kind == NOTHING:
        return None if answer.status == 404 else f"expected 404, got {answer.status}"
    if kind == ADMIN:
        if method != "GET":
            return None
        if role == "manager session":
            return None if answer.status == 200 else f"expected 200, got {answer.status}"
        ok = answer.status == 302 and answer.location.startswith("/admin/login/")
        return None if ok else f"expected the admin login, got {answer.status}"
    if kind == API_DOC:
        if method != "GET":
            return None
        if role == ANONYMOUS:
            ok = answer.status == 401 if url.endswith(".json") else _to_login(answer, url)
        elif role == OUTSIDER_SESSION:
            ok = answer.status == 403
        else:
            ok = answer.status == 200
        return None if ok else f"got {answer.status} {answer.location}"
    # A lab page: a login of a member, never a bare token.
    if role in (ANONYMOUS, MEMBER):
        return None if _to_login(answer, url) else f"expected the login page, got {answer.status}"
    if role == OUTSIDER_SESSION:
        return None if answer.status == 403 else f"expected 403, got {answer.status}"
    assert lab
    if answer.status in (401, 403) or _to_login(answer, url):
        return f"a lab member is refused: {answer.status} {answer.location}"
    if answer.status == 405:
        allowed = getattr(answer, "allow", "")
        if method in allowed:
            return f"405 although Allow says {allowed}"
        return None
    if method == "GET" and answer.status == 302:
        # A page that forwards (the logbook index to the first instrument's) must forward
        # to a page, not to a login.
        return None if answer.location.startswith("/") else f"forwards to {answer.location}"
    if method == "GET" and answer.status not in (200, 204):
        return f"expected the page, got {answer.status}: {answer.body[:200]!r}"
    return None


@pytest.mark.parametrize("role", PAGE_ROLES)
def test_every_page_answers_each_role_as_intended(role, world):
    client, headers = page_client(role, world)
    wrong = []
    for page in pages():
        if page_unfillable(page):
            continue
        kind = page_class(page)
        url = page_url(page, world)
        # Logging out is a POST; sending it would end the session the later pages need.
        methods = ("GET",) if kind == OPEN else ("GET", "POST")
        for method in methods:
            problem = judge_page(kind, role, method, url, fetch(client, headers, method, url))
            if problem:
                wrong.append(f"{method} {url} ({page.name}) [{kind}]: {problem}")
    assert not wrong, f"{role}:\n" + "\n".join(wrong)


def test_every_endpoint_and_page_has_an_expectation():
    """A new operation or page fails here until this file says who may use it."""
    problems = [
        f"API {op.method} {op.path}: {why}" for op in api_operations() if (why := unfillable(op))
    ]
    problems += [
        f"page {page.route} ({page.name}): {why}"
        for page in pages()
        if (why := page_unfillable(page))
    ]
    stale = [
        key for key in API_BODIES if key not in {(op.method, op.path) for op in api_operations()}
    ]
    problems += [f"API_BODIES names {key}, which no longer exists" for key in stale]
    assert not problems, "\n".join(problems)


def test_the_enumeration_sees_the_whole_surface():
    """The walk finds the API's operations and the pages of every app (so an empty walk
    cannot pass the matrix)."""
    ops = {(op.method, op.path) for op in api_operations()}
    assert {("GET", "/instruments"), ("POST", "/files"), ("GET", "/me")} <= ops
    assert len(ops) >= 50
    routes = {page.route for page in pages()}
    assert {"/", "/samples/", "/tips/<int:pk>/", "/admin/", "/login/"} <= routes
    assert not any(r.startswith("/admin/") and r != "/admin/" for r in routes)
    assert "/api/v1/instruments" not in routes
