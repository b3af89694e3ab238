"""The planner pages and the plan exports: they render, name the zone, escape user text, show
the cautions, and the CSV and iCalendar files parse back to the plan."""

from __future__ import annotations

import csv
import io
from datetime import datetime

import pytest
from icalendar import Calendar

from labbook.cryo import actions
from labbook.cryo.models import Refill

pytestmark = pytest.mark.django_db


def test_planner_page_shows_forecast_plan_cautions_and_oxygen(client, member, logged):
    client.force_login(member)
    page = client.get("/cryostats/")
    assert page.status_code == 200
    text = page.content.decode()
    assert "Recommended refill" in text and "Refill plan" in text
    for caution in ("Cold burns", "Asphyxiation", "ice plug", "Never alone", "face shield"):
        assert caution in text, caution
    assert "OSHA 29 CFR 1910.134" in text and "local safety rules" in text
    # 100 L of LHe into 60 m³: 100 × 736.8 L = 73.7 m³ of gas, more than the room: 0 % O₂
    # (REFERENCES.md §10 formula, floored at zero).
    assert "0.0 % O₂" in text
    assert "UTC" in text  # the zone is named
    assert f"/cryostats/{logged.pk}/plot.png" in text
    assert "/cryostats/plan.csv?weeks=4" in text and "/cryostats/plan.ics?weeks=4" in text


def test_pages_need_a_lab_member(client, outsider, logged):
    assert client.get("/cryostats/").status_code == 302  # to the login
    client.force_login(outsider)
    assert client.get("/cryostats/").status_code == 403
    assert client.get(f"/cryostats/{logged.pk}/").status_code == 403
    assert client.get("/cryostats/plan.csv").status_code == 403


def test_user_text_is_escaped(client, member, manager, logged):
    actions.update_cryostat(logged, name="<script>alert(1)</script>", actor=manager)
    client.force_login(member)
    for path in ("/cryostats/", f"/cryostats/{logged.pk}/"):
        text = client.get(path).content.decode()
        assert "<script>alert(1)</script>" not in text
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_the_plot_is_a_png(client, member, logged):
    client.force_login(member)
    answer = client.get(f"/cryostats/{logged.pk}/plot.png?w=350&h=240&scale=2")
    assert answer.status_code == 200 and answer["Content-Type"] == "image/png"
    assert answer.content[:8] == b"\x89PNG\r\n\x1a\n"
    assert client.get(f"/cryostats/{logged.pk}/plot.png?w=9").status_code == 400


def test_the_refill_form_logs_a_refill_and_keeps_bad_input(client, member, logged):
    client.force_login(member)
    url = f"/cryostats/{logged.pk}/refills/"
    bad = client.post(url, {"at": "2026-03-10 09:30", "taken": "8 mbar"})
    assert bad.status_code == 200 and "Not logged yet" in bad.content.decode()
    assert "8 mbar" in bad.content.decode()
    assert not Refill.objects.exists()
    good = client.post(url, {"at": "2026-03-10 09:30", "taken": "10 L", "transferred": "8 L"})
    assert good.status_code == 302
    refill = Refill.objects.get()
    assert refill.losses_l == pytest.approx(2.0) and refill.person == member


def test_plan_csv_parses_back_to_the_plan(client, member, api_as, logged):
    client.force_login(member)
    answer = client.get("/cryostats/plan.csv?weeks=2")
    assert answer["Content-Type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(answer.content.decode())))
    plan = api_as(member).get("/cryostats/plan?weeks=2").json()
    assert len(rows) == len(plan["refills"]) > 0
    for row, refill in zip(rows, plan["refills"], strict=True):
        assert int(row["cryostat"]) == refill["cryostat"]
        assert float(row["order_l"]) == pytest.approx(refill["order_l"], abs=0.005)
        assert row["time_zone"] == "UTC"


def test_plan_ics_parses_back_as_rfc5545_events(client, member, api_as, logged):
    client.force_login(member)
    answer = client.get("/cryostats/plan.ics?weeks=2")
    assert answer["Content-Type"].startswith("text/calendar")
    assert answer.content.startswith(b"BEGIN:VCALENDAR\r\n")  # RFC 5545 §3.1: CRLF lines
    cal = Calendar.from_ical(answer.content)
    assert str(cal["version"]) == "2.0" and cal["prodid"]
    events = [c for c in cal.walk("VEVENT") if str(c["uid"]).startswith("refill-")]
    plan = api_as(member).get("/cryostats/plan?weeks=2").json()
    assert len(events) == len(plan["refills"])
    starts = sorted(e.decoded("dtstart") for e in events)
    # RFC 5545 §3.3.5: a DATE-TIME has whole seconds; the plan, computed from the clock's now,
    # may carry a fraction (a refill due when the level reaches its minimum).
    planned = sorted(
        datetime.fromisoformat(r["at"].replace("Z", "+00:00")).replace(microsecond=0)
        for r in plan["refills"]
    )
    assert starts == planned
    assert len({str(e["uid"]) for e in events}) == len(events)
    assert any(str(c["summary"]).startswith("Order") for c in cal.walk("VEVENT"))


def test_dashboard_shows_next_refills_and_open_alerts(client, member, logged):
    from labbook.cryo.tasks import check_cryostat_alerts

    client.force_login(member)
    text = client.get("/").content.decode()
    assert "Cryogens" in text and f"/cryostats/{logged.pk}/" in text
    assert "Next refill" in text
    logged.level_channel.readings.all().delete()
    check_cryostat_alerts(logged.pk)  # no readings: the level meter is silent
    text = client.get("/").content.decode()
    assert "level readings stale" in text


def test_dashboard_without_cryostats_has_no_panel(client, member, instrument):
    client.force_login(member)
    assert "Cryogens" not in client.get("/").content.decode()


def test_worst_case_oxygen_in_a_larger_room(client, member, manager, logged):
    actions.update_cryostat(logged, room_volume_m3=200.0, actor=manager)
    client.force_login(member)
    # REFERENCES.md §10: 20.9 × (200 − 100 × 0.7368)/200 = 13.2 % (LHe expands 736.8× at 15 °C).
    assert "13.2 % O₂" in client.get("/cryostats/").content.decode()


def test_the_dashboard_reuses_its_plan_until_a_refill_or_a_cryostat_changes(
    member, manager, logged, now, settings
):
    from datetime import timedelta

    from django.core.cache import cache

    from labbook.cryo.queries import dashboard_panel
    from labbook.instruments.models import Reading

    settings.LABBOOK_DASHBOARD_PLAN_SECONDS = 60
    cache.clear()
    first = dashboard_panel(now)
    level = first["rows"][0]["level_l"]
    assert first["planned_at"] == now and level is not None
    # A reading that moves the bath: not seen while the plan is reused (at most a minute).
    Reading.objects.create(
        channel=logged.level_channel, t=now + timedelta(milliseconds=1), value=level / 2
    )
    reused = dashboard_panel(now + timedelta(seconds=20))
    assert reused["planned_at"] == now and reused["rows"][0]["level_l"] == level
    # A logged refill is seen at once: a new plan, which also reads the new level.
    actions.record_refill(logged, at=now - timedelta(minutes=5), taken_l=4.0, actor=member)
    after_refill = dashboard_panel(now + timedelta(seconds=30))
    assert after_refill["planned_at"] == now + timedelta(seconds=30)
    assert after_refill["rows"][0]["level_l"] != level
    # So is a changed cryostat.
    actions.update_cryostat(logged, name="Bath of the LT head", actor=manager)
    renamed = dashboard_panel(now + timedelta(seconds=40))
    assert renamed["planned_at"] == now + timedelta(seconds=40)
    assert renamed["rows"][0]["cryostat"].name == "Bath of the LT head"
    # 0 makes a plan on every load.
    settings.LABBOOK_DASHBOARD_PLAN_SECONDS = 0
    assert dashboard_panel(now + timedelta(seconds=50))["planned_at"] == now + timedelta(
        seconds=50
    )
