"""Alerts fire on synthetic conditions and stay quiet otherwise; managers get one email."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from django.core import mail

from labbook.cryo import actions
from labbook.cryo.models import Alert
from labbook.cryo.tasks import check_cryostat_alerts
from labbook.demo.instruments import insert_readings
from tests.cryo.conftest import NOW, RATE_L_PER_DAY, synthetic_level

pytestmark = pytest.mark.django_db

FRIDAY_EVENING = datetime(2026, 3, 13, 18, 0, tzinfo=UTC)


def _log(cryostat, **kwargs):
    t, level, refills = synthetic_level(**kwargs)
    insert_readings(cryostat.level_channel_id, t, level)
    return t, refills


def _kinds(cryostat, now):
    return set(actions.alert_conditions(cryostat, now))


def test_a_steady_bath_raises_nothing(cryostat):
    _log(cryostat, now=NOW)
    assert _kinds(cryostat, NOW) == set()


def test_boil_off_rising_above_its_trailing_median(cryostat):
    *_, refills = synthetic_level(now=NOW)
    # After the last refill the bath boils off 50 % faster (FIELD.md §3: re-pump above 30 %).
    _log(cryostat, now=NOW, rate_after=(refills[-1], 1.5 * RATE_L_PER_DAY))
    found = actions.alert_conditions(cryostat, NOW)
    assert Alert.Kind.RATE_RISE in found
    details = found[Alert.Kind.RATE_RISE][1]
    assert details["rate_l_per_day"] == pytest.approx(4.5, rel=0.05)
    assert details["trailing_median_l_per_day"] == pytest.approx(3.0, rel=0.05)


def test_a_rise_below_thirty_percent_is_not_an_alert(cryostat):
    *_, refills = synthetic_level(now=NOW)
    _log(cryostat, now=NOW, rate_after=(refills[-1], 1.15 * RATE_L_PER_DAY))
    assert Alert.Kind.RATE_RISE not in _kinds(cryostat, NOW)


def test_minimum_before_monday_on_a_friday_evening(cryostat):
    # Last refill 1.4 days ago: 7.2 L left at 3 L/day reaches 1.5 L on Sunday, before the
    # next working slot (Monday 08:00 in the lab's zone, UTC here).
    _log(cryostat, now=FRIDAY_EVENING, refill_every_days=3.0)
    found = actions.alert_conditions(cryostat, FRIDAY_EVENING)
    assert Alert.Kind.MINIMUM_BEFORE_SLOT in found
    assert found[Alert.Kind.MINIMUM_BEFORE_SLOT][1]["next_slot"].startswith("2026-03-16T08:00")


def test_the_same_level_on_a_wednesday_noon_is_no_alert(cryostat):
    _log(cryostat, now=NOW, refill_every_days=3.0)
    assert Alert.Kind.MINIMUM_BEFORE_SLOT not in _kinds(cryostat, NOW)


def test_stale_level_readings(cryostat):
    t, _ = _log(cryostat, now=NOW)
    last = datetime.fromtimestamp(float(t[-1]), UTC)
    assert Alert.Kind.STALE_LEVEL not in _kinds(cryostat, last + timedelta(minutes=45))
    # Three expected intervals of 30 min (instruments.queries.STALE_FACTOR) have passed.
    assert Alert.Kind.STALE_LEVEL in _kinds(cryostat, last + timedelta(hours=2))


def _flow(cryostat, flow_channel, value):
    cryostat.recovery_flow_channel = flow_channel
    cryostat.save()
    end = int(NOW.timestamp()) // 600 * 600
    t = np.arange(end - 6 * 3600, end + 1, 600, dtype=np.int64)
    insert_readings(flow_channel.pk, t, np.full(t.shape, value))


def test_recovery_flow_zero_while_the_bath_boils(cryostat, flow_channel):
    _log(cryostat, now=NOW)
    _flow(cryostat, flow_channel, 0.0)
    found = actions.alert_conditions(cryostat, NOW)
    assert Alert.Kind.RECOVERY_FLOW_ZERO in found
    # 3 L/day of liquid is 3 × 637 L of gas a day (REFERENCES.md §1) = 1.33 L/min.
    expected = found[Alert.Kind.RECOVERY_FLOW_ZERO][1]["expected_l_per_min"]
    assert expected == pytest.approx(3.0 * 637 / 1440, rel=0.03)


def test_recovery_flow_of_the_boil_off_is_fine(cryostat, flow_channel):
    _log(cryostat, now=NOW)
    _flow(cryostat, flow_channel, 1.35)
    assert Alert.Kind.RECOVERY_FLOW_ZERO not in _kinds(cryostat, NOW)


@pytest.mark.parametrize(("percent", "fires"), [(18.9, True), (19.4, True), (20.8, False)])
def test_room_oxygen_below_19_5_percent(cryostat, oxygen_channel, percent, fires):
    _log(cryostat, now=NOW)
    cryostat.oxygen_channel = oxygen_channel
    cryostat.save()
    insert_readings(oxygen_channel.pk, np.array([int(NOW.timestamp()) - 60]), np.array([percent]))
    # OSHA 29 CFR 1910.134: below 19.5 % O2 is an oxygen-deficient atmosphere.
    assert (Alert.Kind.OXYGEN_LOW in _kinds(cryostat, NOW)) is fires


def test_alerts_open_once_email_managers_and_reopen_after_acknowledgement(
    cryostat, manager, member
):
    manager.email = "mara@example.org"
    manager.save()
    member.email = "bo@example.org"
    member.save()
    t, _ = _log(cryostat, now=NOW)
    late = datetime.fromtimestamp(float(t[-1]), UTC) + timedelta(hours=3)
    opened = actions.check_alerts(cryostat, late)
    assert [a.kind for a in opened] == [Alert.Kind.STALE_LEVEL]
    assert len(mail.outbox) == 1 and mail.outbox[0].to == ["mara@example.org"]
    assert "stale" in mail.outbox[0].subject
    assert actions.check_alerts(cryostat, late + timedelta(minutes=15)) == []
    assert len(mail.outbox) == 1
    alert = Alert.objects.get()
    assert alert.state == "open" and alert.last_seen_at == late + timedelta(minutes=15)
    # The condition clears (readings came back): the alert stays open until acknowledged.
    actions.check_alerts(cryostat, datetime.fromtimestamp(float(t[-1]), UTC))
    alert.refresh_from_db()
    assert alert.state == "open" and alert.cleared_at is not None
    actions.acknowledge_alert(alert, actor=member)
    alert.refresh_from_db()
    assert alert.state == "acknowledged" and alert.acknowledged_by == member
    assert alert.history.first().history_user == member
    assert [a.kind for a in actions.check_alerts(cryostat, late)] == [Alert.Kind.STALE_LEVEL]


def test_the_beat_task_checks_every_cryostat(cryostat):
    # No readings at all: the level meter is silent, which is an alert in itself.
    assert check_cryostat_alerts.delay().get() == {str(cryostat.pk): [Alert.Kind.STALE_LEVEL]}


def test_alerts_api_lists_and_acknowledges(api_as, member, outsider, cryostat):
    check_cryostat_alerts(cryostat.pk)
    listed = api_as(member).get("/cryostats/alerts").json()
    assert [a["kind"] for a in listed] == ["stale_level"]
    path = f"/cryostats/alerts/{listed[0]['id']}/acknowledge"
    assert api_as(member, read_only=True).post(path, {}).status_code == 403
    assert api_as(outsider).post(path, {}).status_code == 403
    assert api_as(member).post(path, {}).json()["state"] == "acknowledged"
    assert api_as(member).get("/cryostats/alerts").json() == []
