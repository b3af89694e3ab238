"""The cryostats API (DESIGN.md §4): names, permissions, forecasts and plans from readings."""

from __future__ import annotations

import pytest

from labbook.cryo.models import Cryostat, Refill
from labbook.instruments.models import InstrumentEvent
from tests.cryo.conftest import RATE_L_PER_DAY

pytestmark = pytest.mark.django_db


def _payload(instrument, level_channel, **extra):
    return {
        "instrument": instrument.pk,
        "cryogen": "LHe",
        "name": "LHe bath",
        "capacity_l": "12 L",
        "minimum_l": 1.5,
        "level_channel": level_channel.pk,
        **extra,
    }


def test_a_manager_creates_a_cryostat_with_quantities_and_defaults(
    api_as, manager, instrument, level_channel
):
    answer = api_as(manager).post("/cryostats", _payload(instrument, level_channel))
    assert answer.status_code == 201, answer.content
    body = answer.json()
    assert body["capacity_l"] == 12.0 and body["level_channel"] == level_channel.pk
    # Common-practice defaults are filled in when nothing is configured.
    assert body["transfer_loss_fraction"] == 0.2 and body["line_cooldown_l"] == 1.0
    cryostat = Cryostat.objects.get(pk=body["id"])
    assert cryostat.history.get().history_user == manager


def test_members_cannot_set_up_cryostats_and_outsiders_see_nothing(
    api_as, member, outsider, manager, instrument, level_channel
):
    assert api_as(member).post("/cryostats", _payload(instrument, level_channel)).status_code == 403
    assert api_as(outsider).get("/cryostats").status_code == 403
    assert api_as(None).get("/cryostats").status_code == 401
    assert api_as(member).get("/cryostats").status_code == 200
    read_only = api_as(manager, read_only=True)
    assert read_only.post("/cryostats", _payload(instrument, level_channel)).status_code == 403
    assert not Cryostat.objects.exists()


def test_bad_input_names_the_field(api_as, manager, instrument, level_channel):
    answer = api_as(manager).post(
        "/cryostats", _payload(instrument, level_channel, capacity_l="12 mbar")
    )
    assert answer.status_code == 422
    assert answer.json()["errors"][0]["field"] == "capacity_l"
    answer = api_as(manager).post("/cryostats", _payload(instrument, level_channel, minimum_l=20))
    assert answer.status_code == 422
    assert answer.json()["errors"][0]["field"] == "minimum_l"


def test_forecast_has_the_contract_fields_and_the_known_rate(api_as, member, logged):
    answer = api_as(member).get(f"/cryostats/{logged.pk}/forecast")
    assert answer.status_code == 200, answer.content
    body = answer.json()
    for name in (
        "cryogen",
        "level_l",
        "rate_l_per_day",
        "rate_uncertainty_l_per_day",
        "heat_load_w",
        "minimum_at",
        "latest_safe_refill_at",
        "recommended_refill_at",
        "band",
    ):
        assert name in body, name
    assert body["cryogen"] == "LHe"
    assert body["rate_l_per_day"] == pytest.approx(RATE_L_PER_DAY, rel=0.02)
    # REFERENCES.md §1: 1 W boils off 1.404 L/h of LHe, so 3 L/day is 3/24/1.404 W.
    assert body["heat_load_w"] == pytest.approx(RATE_L_PER_DAY / 24 / 1.404, rel=0.03)
    assert body["band"]["minimum_at_earliest"] <= body["minimum_at"]


def test_forecast_without_readings_is_a_clear_409(api_as, member, cryostat):
    answer = api_as(member).get(f"/cryostats/{cryostat.pk}/forecast")
    assert answer.status_code == 409
    assert "LHe bath level" in answer.json()["detail"]


def test_plans_list_refills_with_orders_and_cost(api_as, member, logged):
    for path in (f"/cryostats/{logged.pk}/plan?weeks=2", "/cryostats/plan?weeks=2"):
        answer = api_as(member).get(path)
        assert answer.status_code == 200, answer.content
        body = answer.json()
        refills = body["refills"]
        # 3 L/day from 11.4 L to a 1.5 L minimum: a refill at least every 3.3 days.
        assert 4 <= len(refills) <= 10
        for r in refills:
            assert set(r) >= {"cryostat", "cryogen", "at", "level_before_l", "amount_l", "order_l"}
            assert r["level_before_l"] >= logged.minimum_l
            # The order covers the loss: amount / (1 − 0.2) + 1 L for the line.
            assert r["order_l"] == pytest.approx(r["amount_l"] / 0.8 + 1.0, rel=1e-6)
        assert body["total_order_l"]["LHe"] == pytest.approx(sum(r["order_l"] for r in refills))
        assert body["cost"] == pytest.approx(14.0 * body["total_order_l"]["LHe"])
        assert body["order_by"]["LHe"] <= refills[0]["at"][:10]
    assert api_as(member).get("/cryostats/plan?weeks=0").status_code == 422


def test_logging_a_refill_also_puts_it_on_the_instrument_timeline(
    api_as, member, logged, other_instrument
):
    answer = api_as(member).post(
        f"/cryostats/{logged.pk}/refills",
        {"at": "2026-03-10T09:30:00+01:00", "taken_l": "10 L", "transferred_l": 8.0},
    )
    assert answer.status_code == 201, answer.content
    body = answer.json()
    assert body["losses_l"] == pytest.approx(2.0)
    refill = Refill.objects.get(pk=body["id"])
    assert refill.person == member and refill.history.get().history_user == member
    event = InstrumentEvent.objects.get(pk=body["event"])
    assert event.kind == "cryogen_transfer" and event.details["cryogen"] == "LHe"
    bad = api_as(member).post(f"/cryostats/{logged.pk}/refills", {"taken_l": 5, "transferred_l": 8})
    assert bad.status_code == 422 and bad.json()["errors"][0]["field"] == "transferred_l"


def test_refill_writes_respect_token_limits(api_as, member, outsider, logged, other_instrument):
    path = f"/cryostats/{logged.pk}/refills"
    assert api_as(member, read_only=True).post(path, {"taken_l": 5}).status_code == 403
    assert api_as(member, instrument=other_instrument).post(path, {"taken_l": 5}).status_code == 403
    assert api_as(outsider).post(path, {"taken_l": 5}).status_code == 403
    assert (
        api_as(member, instrument=logged.instrument).post(path, {"taken_l": 5}).status_code == 201
    )
    assert api_as(member, read_only=True).get(path).status_code == 200
    assert Refill.objects.count() == 1
