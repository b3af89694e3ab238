"""The demo's cryostats: LTM-1's LHe bath and LN2 shield on their level channels, a calendar
with the one cryogen holiday, a week of raised boil-off that the rate alert caught, and
forecasts from the year of logs that match the story's boil-off."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from labbook.cryo import queries
from labbook.cryo.models import Alert, Cryostat, Holiday, LabCalendar
from labbook.demo import readings as gen
from labbook.demo.load import demo_window, load_demo

NOW = datetime(2025, 3, 12, 14, 37, 21, tzinfo=UTC)
BERLIN = ZoneInfo("Europe/Berlin")


@pytest.fixture(autouse=True)
def _fast_passwords(settings):
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]


def _year():
    start, end = demo_window(NOW, 365)
    scenario = gen.Scenario(bake_start_s=gen.bake_start_for(start))
    return scenario, gen.plan(scenario, int(start.timestamp()), int(end.timestamp()))


def _local_day(t_s: int):
    return datetime.fromtimestamp(t_s, UTC).astimezone(BERLIN).date()


def test_nobody_fills_on_the_holiday_and_helium_moves_to_the_thursday():
    scenario, plan = _year()
    holiday = gen.cryo_holiday(scenario)
    assert holiday.weekday() == 2  # a Wednesday: the bath bridges it
    fills = [tr for tr in plan.lhe + plan.ln2 if tr.kind == "fill"]
    assert not [tr for tr in fills if _local_day(tr.start_s) == holiday]
    thursday = holiday + timedelta(days=1)
    on_thursday = sorted(
        (tr.start_s, tr.cryogen) for tr in fills if _local_day(tr.start_s) == thursday
    )
    assert [cryogen for _, cryogen in on_thursday] == ["LN2", "LHe"]  # nitrogen first
    # Monday's fill lasts until Thursday morning with a fifth of the bath to spare.
    thursday_fill = next(
        tr for tr in plan.lhe if tr.kind == "fill" and _local_day(tr.start_s) == thursday
    )
    assert 10.0 < thursday_fill.level_before_pct < 35.0


def test_one_week_of_raised_boil_off_then_back_to_normal():
    scenario, plan = _year()
    monday, friday = gen.raised_boiloff_week(scenario)
    level = plan.lhe_level
    per_day_l = level.rate_pct_per_s * 86400 / 100 * scenario.lhe_capacity_l
    days = np.array([_local_day(int(s)) for s in level.start])
    raised = (days >= monday) & (days < friday)
    assert raised.sum() == 2  # after the Monday and Wednesday fills
    normal = np.median(per_day_l[~raised])
    assert normal == pytest.approx(scenario.lhe_boiloff_l_per_day, rel=0.02)
    assert (per_day_l[raised] > 1.3 * normal).all()  # FIELD.md §3: act above +30 %
    # The lab re-pumped on the Friday: the fills after it boil off normally again.
    after = (days >= friday) & (days < friday + timedelta(days=14))
    assert (per_day_l[after] < 1.1 * normal).all()


@pytest.mark.django_db
def test_demo_sets_up_the_cryostats_calendar_and_the_caught_rate_rise():
    counts = load_demo(days=150, now=NOW)
    assert counts["cryostats"] == 2 and counts["holidays"] == 1
    lhe = Cryostat.objects.get(name="LHe bath")
    ln2 = Cryostat.objects.get(name="LN2 shield")
    assert (lhe.cryogen, lhe.level_channel.name, lhe.capacity_l) == ("LHe", "LHe bath level", 12)
    assert (ln2.cryogen, ln2.level_channel.name, ln2.capacity_l) == ("LN2", "LN2 shield level", 24)
    assert lhe.recovery_flow_channel.name == "He recovery flow"
    assert lhe.history.get().history_user.username == "greta"
    calendar = LabCalendar.objects.get()
    assert calendar.time_zone == "Europe/Berlin" and calendar.working_days == [0, 1, 2, 3, 4]
    scenario = gen.Scenario(bake_start_s=gen.bake_start_for(demo_window(NOW, 365)[0]))
    assert Holiday.objects.get().day == gen.cryo_holiday(scenario)
    caught = Alert.objects.get(kind=Alert.Kind.RATE_RISE)
    monday, _ = gen.raised_boiloff_week(scenario)
    assert caught.opened_at.astimezone(BERLIN).date() == monday + timedelta(days=2)
    assert caught.state == "acknowledged" and caught.acknowledged_by.username == "greta"
    assert caught.details["rate_l_per_day"] > 1.3 * caught.details["trailing_median_l_per_day"]
    # The forecast now follows the story: 3.0 L/day of helium, 5.3 L/day of nitrogen, each
    # with the story's ±4 % jitter from one fill to the next.
    for cryostat, rate in ((lhe, 3.0), (ln2, 5.3)):
        fc = queries.forecast_for(cryostat, NOW).forecast
        assert fc.rate_l_per_day == pytest.approx(rate, rel=0.12), cryostat
        assert fc.recommended_refill_at is not None and fc.recommended_refill_at > NOW
    plan = queries.lab_plan(NOW, 2)
    assert not plan.skipped and plan.refills
    assert {r.cryogen for r in plan.refills} == {"LHe", "LN2"}
    assert all(r.level_before_l >= plan.cryostats[r.cryostat].minimum_l for r in plan.refills)
    again = load_demo(days=150, now=NOW)
    assert {k: again[k] for k in ("cryostats", "holidays", "cryo_alerts")} == {
        k: counts[k] for k in ("cryostats", "holidays", "cryo_alerts")
    }
