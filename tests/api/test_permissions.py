"""Who may call what: anonymous, outsider, member, manager, read-only and instrument-scoped
tokens, and the browser session with CSRF."""

from __future__ import annotations

import pytest
from django.test import Client

from tests.conftest import ApiClient

pytestmark = pytest.mark.django_db


def channel_body(instrument, name="prep ion gauge"):
    return {
        "instrument": instrument.pk,
        "name": name,
        "quantity": "pressure",
        "unit": "mbar",
        "gas": "N2",
    }


def test_anonymous_gets_401_in_the_api_error_format(instrument):
    anonymous = ApiClient()
    for response in (
        anonymous.get("/instruments"),
        anonymous.post("/channels", channel_body(instrument)),
    ):
        assert response.status_code == 401
        assert "authentication required" in response.json()["detail"]


def test_outsider_is_refused_by_token_and_by_session(outsider, api_as):
    assert api_as(outsider).get("/instruments").status_code == 403
    client = Client()
    client.force_login(outsider)
    response = ApiClient(client=client).get("/instruments")
    assert response.status_code == 403
    assert response.json()["detail"] == "this account is not a member of the lab"


def test_member_reads_and_logs_channels_but_cannot_create_instruments(member, instrument, api_as):
    api = api_as(member)
    listed = api.get("/instruments")
    assert listed.status_code == 200
    assert [item["name"] for item in listed.json()] == ["LTM-T"]
    created = api.post("/channels", channel_body(instrument))
    assert created.status_code == 201, created.content
    assert created.json()["instrument"] == instrument.pk
    refused = api.post("/instruments", {"name": "LTM-2"})
    assert refused.status_code == 403
    assert refused.json()["detail"] == "only lab managers may do this"


def test_manager_creates_instruments(manager, api_as):
    response = api_as(manager).post("/instruments", {"name": "LTM-2", "time_zone": "Europe/Berlin"})
    assert response.status_code == 201, response.content
    assert response.json()["time_zone"] == "Europe/Berlin"


def test_read_only_token_reads_but_never_writes(manager, instrument, api_as):
    api = api_as(manager, read_only=True)
    assert api.get("/instruments").status_code == 200
    for path, body in (
        ("/channels", channel_body(instrument)),
        ("/instruments", {"name": "LTM-9"}),
    ):
        response = api.post(path, body)
        assert response.status_code == 403
        assert response.json()["detail"] == "this token is read-only"


def test_instrument_scoped_token_writes_only_its_instrument(
    manager, instrument, other_instrument, api_as
):
    api = api_as(manager, instrument=instrument)
    assert api.post("/channels", channel_body(instrument)).status_code == 201
    refused = api.post("/channels", channel_body(other_instrument))
    assert refused.status_code == 403
    assert f"instrument {instrument.pk}" in refused.json()["detail"]
    # Lab-wide changes are out of an instrument token's reach, even for a manager's token.
    assert api.post("/instruments", {"name": "LTM-3"}).status_code == 403
    assert api.get("/me").json()["token_instrument"] == instrument.pk


def test_session_writes_need_the_csrf_token(member, instrument):
    client = Client(enforce_csrf_checks=True)
    client.force_login(member)
    api = ApiClient(client=client)
    assert api.get("/instruments").status_code == 200
    assert api.post("/channels", channel_body(instrument)).status_code == 403
    client.get("/")  # the dashboard sets the CSRF cookie
    csrf = client.cookies["csrftoken"].value
    response = client.post(
        "/api/v1/channels",
        channel_body(instrument),
        content_type="application/json",
        headers={"X-CSRFToken": csrf},
    )
    assert response.status_code == 201, response.content


def test_bad_input_names_the_field(member, instrument, api_as):
    response = api_as(member).post("/channels", {**channel_body(instrument), "quantity": "mood"})
    assert response.status_code == 422
    body = response.json()
    assert body["detail"] == "the request has invalid fields"
    assert [error["field"] for error in body["errors"]] == ["quantity"]


def test_duplicate_channel_is_a_clear_error(member, instrument, api_as):
    api = api_as(member)
    assert api.post("/channels", channel_body(instrument)).status_code == 201
    again = api.post("/channels", channel_body(instrument))
    assert again.status_code == 422
    assert again.json()["errors"][0]["field"] == "__all__"


def test_invalid_time_zone_is_named(manager, api_as):
    response = api_as(manager).post("/instruments", {"name": "LTM-Z", "time_zone": "Mars/Olympus"})
    assert response.status_code == 422
    assert response.json()["errors"] == [
        {
            "field": "time_zone",
            "message": "'Mars/Olympus' is not an IANA time zone (e.g. Europe/Berlin)",
        }
    ]


def test_openapi_document_is_served_to_members_only(member, api_as):
    assert api_as(None).get("/openapi.json").status_code == 401
    assert Client().get("/api/v1/docs").status_code == 302  # to the login page
    response = api_as(member).get("/openapi.json")
    assert response.status_code == 200
    assert "/api/v1/instruments" in response.json()["paths"]


def test_outsider_cannot_read_the_api_document(outsider, api_as):
    assert api_as(outsider).get("/openapi.json").status_code == 403
