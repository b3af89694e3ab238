"""The tips endpoints: shapes, units, errors, and who may call them."""

from __future__ import annotations

from datetime import timedelta

import pytest

from labbook.tips import actions
from labbook.tips.models import Conditioning, Tip, TipMount
from tests.tips.conftest import T0

pytestmark = pytest.mark.django_db

H = timedelta(hours=1)


def iso(at) -> str:
    return at.isoformat().replace("+00:00", "Z")


def fields_of(response) -> list[str]:
    return [error["field"] for error in response.json()["errors"]]


def test_create_a_tip_on_a_force_sensor_with_units(member, api_as):
    response = api_as(member).post(
        "/tips",
        {
            "name": "PtIr-7",
            "material": "PtIr",
            "origin": "cut",
            "sensor_kind": "tuning_fork",
            "resonance_frequency_hz": "30.5 kHz",
            "resonance_frequency_nominal_hz": "32.768 kHz",
            "quality_factor": 38000,
            "stiffness_n_per_m": "1.9 kN/m",
            "stiffness_nominal_n_per_m": 1800,
            "stiffness_method": "thermal noise",
        },
    )
    assert response.status_code == 201, response.content
    body = response.json()
    assert body["resonance_frequency_hz"] == 30_500.0
    assert body["resonance_frequency_nominal_hz"] == 32_768.0
    assert body["stiffness_n_per_m"] == 1_900.0
    assert body["current_mount"] is None
    assert Tip.objects.get(name="PtIr-7").history.get().history_user == member


def test_tip_input_errors_name_the_field(member, api_as, tip):
    api = api_as(member)
    wrong_unit = api.post(
        "/tips",
        {"name": "X", "material": "W", "sensor_kind": "cantilever", "stiffness_n_per_m": "3 V"},
    )
    assert wrong_unit.status_code == 422
    assert fields_of(wrong_unit) == ["stiffness_n_per_m"]
    no_sensor = api.post("/tips", {"name": "Y", "material": "W", "quality_factor": 1000})
    assert no_sensor.status_code == 422
    assert fields_of(no_sensor) == ["quality_factor"]
    duplicate = api.post("/tips", {"name": "W-12", "material": "W"})
    assert duplicate.status_code == 422
    assert fields_of(duplicate) == ["name"]


def test_mount_condition_and_read_the_state(member, instrument, tip, api_as):
    api = api_as(member)
    mounted = api.post(f"/tips/{tip.pk}/mounts", {"instrument": instrument.pk, "start": iso(T0)})
    assert mounted.status_code == 201, mounted.content
    mount = mounted.json()
    assert mount["instrument"] == instrument.pk and mount["tip"] == tip.pk
    assert mount["start"] == "2026-03-02T09:00:00Z" and mount["end"] is None
    assert mount["closed_previous"] is None

    conditioned = api.post(
        f"/tips/{tip.pk}/conditioning",
        {
            "kind": "field_emission",
            "at": "2026-03-02T11:00:00+01:00",
            "params": {"voltage_v": "100 V", "current_a": "1 uA"},
            "outcome": "stable apex, clean Cu(111) step edges",
        },
    )
    assert conditioned.status_code == 201, conditioned.content
    event = conditioned.json()
    assert event["at"] == "2026-03-02T10:00:00Z"  # answered in UTC
    assert event["instrument"] == instrument.pk
    assert event["params"] == {"voltage_v": 100.0, "current_a": pytest.approx(1e-6)}
    assert event["params_raw"] == {"voltage_v": "100 V", "current_a": "1 uA"}

    detail = api.get(f"/tips/{tip.pk}").json()
    assert detail["current_mount"]["id"] == mount["id"]
    assert [e["id"] for e in detail["state"]["events"]] == [event["id"]]

    at_ten = api.get(f"/instruments/{instrument.pk}/tip", at="2026-03-02T10:30:00Z").json()
    assert at_ten["tip"]["name"] == "W-12"
    assert at_ten["mount"]["id"] == mount["id"]
    assert [e["kind"] for e in at_ten["events"]] == ["field_emission"]
    before = api.get(f"/instruments/{instrument.pk}/tip", at="2026-03-02T08:00:00Z").json()
    assert before == {
        "at": "2026-03-02T08:00:00Z",
        "tip": None,
        "mount": None,
        "events": [],
        "apex_species": None,
    }


def test_a_time_without_a_zone_is_refused(member, instrument, tip, api_as):
    api = api_as(member)
    response = api.get(f"/instruments/{instrument.pk}/tip", at="2026-03-02T10:30:00")
    assert response.status_code == 422
    assert fields_of(response) == ["query.at"]  # labbook/api.py keeps the "query." part
    mounted = api.post(
        f"/tips/{tip.pk}/mounts", {"instrument": instrument.pk, "start": "2026-03-02T09:00"}
    )
    assert mounted.status_code == 422
    assert fields_of(mounted) == ["start"]


def test_a_parameter_in_a_wrong_unit_is_a_422_naming_it(member, instrument, tip, api_as):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    response = api_as(member).post(
        f"/tips/{tip.pk}/conditioning",
        {"kind": "indentation", "at": iso(T0 + H), "params": {"depth_m": "2 V"}},
    )
    assert response.status_code == 422
    assert fields_of(response) == ["params.depth_m"]
    assert "cannot be converted to m" in response.json()["errors"][0]["message"]
    assert not Conditioning.objects.exists()


def test_overlapping_mount_is_a_422_naming_the_mount(
    member, instrument, other_instrument, tip, other_tip, api_as
):
    api = api_as(member)
    first = actions.mount_tip(tip, instrument, start=T0, end=T0 + 2 * H, actor=member).mount
    clash = api.post(
        f"/tips/{other_tip.pk}/mounts", {"instrument": instrument.pk, "start": iso(T0 + H)}
    )
    assert clash.status_code == 422
    assert clash.json()["errors"][0]["field"] == "start"
    assert f"mount #{first.pk}" in clash.json()["errors"][0]["message"]
    elsewhere = api.post(
        f"/tips/{tip.pk}/mounts", {"instrument": other_instrument.pk, "start": iso(T0 + H)}
    )
    assert elsewhere.status_code == 422
    assert "a tip is in one instrument at a time" in elsewhere.json()["errors"][0]["message"]


def test_mounting_answers_the_mount_it_closed_and_ending_a_mount(
    member, instrument, tip, other_tip, api_as
):
    api = api_as(member)
    old = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    response = api.post(
        f"/tips/{other_tip.pk}/mounts", {"instrument": instrument.pk, "start": iso(T0 + H)}
    )
    assert response.status_code == 201
    assert response.json()["closed_previous"]["id"] == old.pk
    assert response.json()["closed_previous"]["end"] == "2026-03-02T10:00:00Z"
    new_id = response.json()["id"]

    ended = api.post(f"/tips/{other_tip.pk}/mounts/{new_id}/end", {"end": iso(T0 + 5 * H)})
    assert ended.status_code == 200, ended.content
    assert ended.json()["end"] == "2026-03-02T14:00:00Z"
    again = api.post(f"/tips/{other_tip.pk}/mounts/{new_id}/end", {})
    assert again.status_code == 422
    # A mount of another tip is not found under this tip.
    assert api.post(f"/tips/{tip.pk}/mounts/{new_id}/end", {}).status_code == 404


def test_files_of_a_tip_are_an_empty_page_until_datasets_exist(member, tip, api_as):
    api = api_as(member)
    response = api.get(f"/tips/{tip.pk}/files")
    assert response.status_code == 200
    assert response.json() == {"items": [], "count": 0}
    missing = api.get("/tips/999999/files")
    assert missing.status_code == 404
    assert api.get("/tips/999999").status_code == 404
    assert api.get("/instruments/999999/tip").status_code == 404


def test_list_tips_with_their_current_mount(member, instrument, tip, other_tip, api_as):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    body = api_as(member).get("/tips").json()
    assert body["count"] == 2
    by_name = {item["name"]: item for item in body["items"]}
    assert by_name["W-12"]["current_mount"]["instrument"] == instrument.pk
    assert by_name["PtIr-3"]["current_mount"] is None
    assert api_as(member).get("/tips", origin="cut").json()["count"] == 1


# --- who may call what ----------------------------------------------------------------------


def test_anonymous_and_outsiders_are_refused(outsider, instrument, tip, api_as):
    anonymous = api_as(None)
    assert anonymous.get("/tips").status_code == 401
    assert anonymous.post("/tips", {"name": "Z", "material": "W"}).status_code == 401
    assert anonymous.get(f"/instruments/{instrument.pk}/tip").status_code == 401
    stranger = api_as(outsider)
    assert stranger.get("/tips").status_code == 403
    assert stranger.get(f"/tips/{tip.pk}").status_code == 403
    assert (
        stranger.post(
            f"/tips/{tip.pk}/mounts", {"instrument": instrument.pk, "start": iso(T0)}
        ).status_code
        == 403
    )


def test_a_read_only_token_reads_but_never_writes(member, instrument, tip, api_as):
    api = api_as(member, read_only=True)
    assert api.get(f"/tips/{tip.pk}").status_code == 200
    for path, body in (
        ("/tips", {"name": "Z", "material": "W"}),
        (f"/tips/{tip.pk}/mounts", {"instrument": instrument.pk, "start": iso(T0)}),
        (f"/tips/{tip.pk}/conditioning", {"kind": "pulse", "instrument": instrument.pk}),
    ):
        response = api.post(path, body)
        assert response.status_code == 403
        assert response.json()["detail"] == "this token is read-only"
    assert not TipMount.objects.exists() and not Conditioning.objects.exists()


def test_an_instrument_token_writes_only_on_its_instrument(
    member, instrument, other_instrument, tip, other_tip, api_as
):
    api = api_as(member, instrument=instrument)
    refused = api.post(f"/tips/{tip.pk}/mounts", {"instrument": other_instrument.pk})
    assert refused.status_code == 403
    assert f"instrument {instrument.pk}" in refused.json()["detail"]
    assert api.post(f"/tips/{tip.pk}/mounts", {"instrument": instrument.pk}).status_code == 201

    # other_tip sits in the other microscope: conditioning it there is not this token's business,
    # whether the instrument is given or found from the mount.
    elsewhere = actions.mount_tip(other_tip, other_instrument, start=T0, actor=member).mount
    at = iso(T0 + H)
    for body in ({"kind": "pulse", "at": at}, {"kind": "pulse", "at": at, "instrument": None}):
        assert api.post(f"/tips/{other_tip.pk}/conditioning", body).status_code == 403
    assert api.post(f"/tips/{other_tip.pk}/mounts/{elsewhere.pk}/end", {}).status_code == 403
    # Tips belong to no instrument: creating one is lab-wide.
    assert api.post("/tips", {"name": "Z", "material": "W"}).status_code == 403
    assert not Conditioning.objects.exists()
