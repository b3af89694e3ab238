"""Lab calendar, forecasts and refill plans of labbook.science.cryogen.

The safety checks are built here independently of the module: the level is integrated at the
worst-case rate (rate + 2 sigma) between the planned refills, and working days are counted
with numpy.busday_count / busday_offset (numpy's business-day calendar) rather than with the
calendar under test.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labbook.science import cryogen as cg
from labbook.science.errors import ScienceInputError

BERLIN = ZoneInfo("Europe/Berlin")
WHIT_MONDAY = date(2026, 5, 25)  # a public holiday in Germany
FRIDAY = datetime(2026, 5, 22, 9, 0, tzinfo=BERLIN)  # the Friday before it


def worst_level(level: float, rate: float, sigma: float, start: datetime, at: datetime) -> float:
    return level - (rate + 2 * sigma) * (at - start).total_seconds() / 86_400


def lhe_forecast(now, level, *, calendar, rate=3.0, sigma=0.1, minimum=2.0, margin_h=12.0):
    return cg.forecast(
        name="LHe",
        level_now_l=level,
        now=now,
        rate_l_per_day=rate,
        rate_uncertainty_l_per_day=sigma,
        minimum_l=minimum,
        calendar=calendar,
        margin_h=margin_h,
    )


def level_for_minimum_at(target: datetime, now: datetime, *, rate=3.2, minimum=2.0) -> float:
    """The level now that reaches ``minimum`` at ``target`` at the worst-case rate."""
    return minimum + rate * (target - now).total_seconds() / 86_400


def assert_safe_recommendation(f: cg.Forecast, calendar: cg.LabCalendar, now, level):
    """The recommended refill is a working slot, and without it the level stays above the
    minimum (with the margin) until the working slot after it."""
    assert f.recommended_refill_at is not None
    assert calendar.is_working(f.recommended_refill_at)
    following = calendar.next_working_slot(f.recommended_refill_at)
    assert worst_level(level, 3.0, 0.1, now, following + timedelta(hours=12)) >= 2.0 - 1e-9
    assert f.recommended_refill_at >= now


# --- calendar -------------------------------------------------------------------------------


def test_working_hours_days_and_holidays():
    cal = cg.LabCalendar(holidays=frozenset({WHIT_MONDAY}))
    assert cal.is_working(datetime(2026, 5, 22, 8, 0, tzinfo=BERLIN))
    assert cal.is_working(datetime(2026, 5, 22, 16, 59, tzinfo=BERLIN))
    assert not cal.is_working(datetime(2026, 5, 22, 17, 0, tzinfo=BERLIN))
    assert not cal.is_working(datetime(2026, 5, 22, 7, 59, tzinfo=BERLIN))
    assert not cal.is_working(datetime(2026, 5, 23, 10, 0, tzinfo=BERLIN))  # Saturday
    assert not cal.is_working(datetime(2026, 5, 25, 10, 0, tzinfo=BERLIN))  # Whit Monday
    # 06:30 UTC is 08:30 in Berlin in summer (CEST, UTC+2)
    assert cal.is_working(datetime(2026, 5, 26, 6, 30, tzinfo=UTC))
    assert not cal.is_working(datetime(2026, 5, 26, 5, 30, tzinfo=UTC))


def test_next_working_slot_over_a_long_weekend():
    cal = cg.LabCalendar(holidays=frozenset({WHIT_MONDAY}))
    after = datetime(2026, 5, 22, 16, 30, tzinfo=BERLIN)
    assert cal.next_working_slot(after) == datetime(2026, 5, 26, 8, 0, tzinfo=BERLIN)
    # strictly after: a slot is not its own next slot
    slot = datetime(2026, 5, 26, 9, 0, tzinfo=BERLIN)
    assert cal.next_working_slot(slot) == datetime(2026, 5, 26, 10, 0, tzinfo=BERLIN)
    assert cal.previous_working_slot(datetime(2026, 5, 26, 8, 0, tzinfo=BERLIN)) == datetime(
        2026, 5, 22, 16, 0, tzinfo=BERLIN
    )


def test_working_slots_follow_the_local_clock_across_the_change_to_summer_time():
    # Clocks in Europe go forward on Sunday 29 March 2026: 08:00 local is 07:00 UTC on the
    # Friday before and 06:00 UTC on the Monday after.
    cal = cg.LabCalendar()
    slots = cal.working_slots(
        datetime(2026, 3, 27, 15, 0, tzinfo=BERLIN), datetime(2026, 3, 30, 9, 0, tzinfo=BERLIN)
    )
    assert [s.astimezone(UTC).hour for s in slots] == [14, 15, 6, 7]
    assert all(cal.is_working(s) for s in slots)


def test_working_days_before_counts_like_numpy_busday():
    holidays = frozenset({WHIT_MONDAY, date(2026, 6, 4)})
    cal = cg.LabCalendar(holidays=holidays)
    numpy_holidays = sorted(np.datetime64(h) for h in holidays)
    for day in [date(2026, 5, 27), date(2026, 6, 1), date(2026, 6, 5), date(2026, 6, 8)]:
        for n in [0, 1, 5, 10]:
            expected = np.busday_offset(
                np.datetime64(day), -n, roll="backward", holidays=numpy_holidays
            )
            if n == 0:
                expected = np.datetime64(day)
            assert np.datetime64(cal.working_days_before(day, n)) == expected, (day, n)
    # Wednesday 27 May, 5 working days before, with Whit Monday in between: Tuesday the 19th
    assert cal.working_days_before(date(2026, 5, 27), 5) == date(2026, 5, 19)


def test_bad_calendars_are_refused():
    with pytest.raises(ScienceInputError, match="unknown time zone 'Mars/Olympus'"):
        cg.LabCalendar(tz="Mars/Olympus")
    with pytest.raises(ScienceInputError, match="working_days"):
        cg.LabCalendar(working_days=(0, 7))
    with pytest.raises(ScienceInputError, match="day_end"):
        cg.LabCalendar(day_start=time(17), day_end=time(8))
    with pytest.raises(ScienceInputError, match="timezone-aware"):
        cg.LabCalendar().is_working(datetime(2026, 5, 22, 9, 0))  # noqa: DTZ001
    with pytest.raises(ScienceInputError, match="n must be"):
        cg.LabCalendar().working_days_before(date(2026, 5, 22), -1)


# --- forecast -------------------------------------------------------------------------------


def test_forecast_times_and_band_by_hand():
    cal = cg.LabCalendar()
    now = datetime(2026, 5, 19, 9, 0, tzinfo=BERLIN)  # Tuesday
    # 8 L, minimum 2 L: 6 L to go. At 3 L/day: 2 days; at 3.2: 1.875 d = 45 h; at 2.8:
    # 2.142857 d = 51 h 25 m 43 s.
    f = lhe_forecast(now, 8.0, calendar=cal)
    assert f.minimum_at == now + timedelta(days=2)
    assert f.minimum_at_earliest == now + timedelta(hours=45)
    assert abs(f.minimum_at_latest - (now + timedelta(days=6 / 2.8))) < timedelta(seconds=1)
    assert f.latest_safe_refill_at == now + timedelta(hours=33)  # Wed 18:00
    # The last slot before Wed 18:00 is Wed 16:00; the recommended one is Wed 15:00, so
    # that a missed transfer still has the 16:00 slot.
    assert f.recommended_refill_at == datetime(2026, 5, 20, 15, 0, tzinfo=BERLIN)
    assert f.warning is None
    assert f.heat_load_w == pytest.approx(cg.heat_load_w(3.0, "LHe"))
    assert_safe_recommendation(f, cal, now, 8.0)


def test_friday_refill_when_the_bath_would_run_dry_over_the_weekend():
    cal = cg.LabCalendar()
    minimum_at = datetime(2026, 5, 17, 12, 0, tzinfo=BERLIN)  # Sunday noon
    now = datetime(2026, 5, 15, 9, 0, tzinfo=BERLIN)
    level = level_for_minimum_at(minimum_at, now)
    f = lhe_forecast(now, level, calendar=cal)
    assert f.minimum_at_earliest == minimum_at
    assert f.recommended_refill_at.date() == date(2026, 5, 15)
    assert f.recommended_refill_at.weekday() == 4  # never a Saturday refill
    assert_safe_recommendation(f, cal, now, level)


@pytest.mark.parametrize("holiday", [True, False])
def test_friday_before_a_long_weekend(holiday):
    # The worst case reaches the minimum on Whit Monday at 22:00; with the 12 h margin the
    # latest safe refill is Monday 10:00. On an ordinary Monday the refill can wait for Monday
    # 09:00 (with the 10:00 slot to spare); when Monday is a holiday it must be done on Friday.
    cal = cg.LabCalendar(holidays=frozenset({WHIT_MONDAY}) if holiday else frozenset())
    level = level_for_minimum_at(datetime(2026, 5, 25, 22, 0, tzinfo=BERLIN), FRIDAY)
    f = lhe_forecast(FRIDAY, level, calendar=cal)
    assert f.latest_safe_refill_at == datetime(2026, 5, 25, 10, 0, tzinfo=BERLIN)
    expected = (
        datetime(2026, 5, 22, 15, 0, tzinfo=BERLIN)
        if holiday
        else datetime(2026, 5, 25, 9, 0, tzinfo=BERLIN)
    )
    assert f.recommended_refill_at == expected
    assert_safe_recommendation(f, cal, FRIDAY, level)


def test_a_holiday_midweek_moves_the_refill_to_the_day_before():
    holiday = date(2026, 6, 4)  # a Thursday (Corpus Christi in parts of Germany)
    cal = cg.LabCalendar(holidays=frozenset({holiday}))
    now = datetime(2026, 6, 2, 9, 0, tzinfo=BERLIN)  # Tuesday
    level = level_for_minimum_at(datetime(2026, 6, 5, 0, 0, tzinfo=BERLIN), now)
    f = lhe_forecast(now, level, calendar=cal)
    assert f.recommended_refill_at == datetime(2026, 6, 3, 15, 0, tzinfo=BERLIN)
    assert_safe_recommendation(f, cal, now, level)


def test_no_working_slot_in_time_recommends_nothing_and_warns():
    cal = cg.LabCalendar()
    now = datetime(2026, 5, 22, 18, 0, tzinfo=BERLIN)  # Friday evening
    level = level_for_minimum_at(datetime(2026, 5, 23, 20, 0, tzinfo=BERLIN), now)
    f = lhe_forecast(now, level, calendar=cal)
    assert f.recommended_refill_at is None
    assert "before the next working slot" in f.warning
    # and a bath already within the margin of its minimum
    f = lhe_forecast(now, 2.05, calendar=cal)
    assert f.recommended_refill_at is None
    assert "refill now" in f.warning


def test_forecast_with_no_consumption():
    f = lhe_forecast(FRIDAY, 8.0, calendar=cg.LabCalendar(), rate=-0.5, sigma=0.1)
    assert f.minimum_at is None
    assert f.minimum_at_earliest is None
    assert f.latest_safe_refill_at is None
    assert f.recommended_refill_at is None
    # consumption within the band: a worst case exists, but no central estimate
    f = lhe_forecast(FRIDAY, 8.0, calendar=cg.LabCalendar(), rate=0.0, sigma=0.5)
    assert f.minimum_at is None
    assert f.minimum_at_earliest == FRIDAY + timedelta(days=6)
    assert f.minimum_at_latest is None


def test_bad_forecast_inputs():
    cal = cg.LabCalendar()
    with pytest.raises(ScienceInputError, match="unknown cryogen"):
        cg.forecast(
            name="LAr", level_now_l=5, now=FRIDAY, rate_l_per_day=1,
            rate_uncertainty_l_per_day=0.1, minimum_l=1, calendar=cal,
        )  # fmt: skip
    with pytest.raises(ScienceInputError, match="timezone-aware"):
        lhe_forecast(datetime(2026, 5, 22, 9), 5.0, calendar=cal)  # noqa: DTZ001
    with pytest.raises(ScienceInputError, match="level_now_l"):
        lhe_forecast(FRIDAY, float("nan"), calendar=cal)
    with pytest.raises(ScienceInputError, match="rate_uncertainty_l_per_day"):
        lhe_forecast(FRIDAY, 5.0, calendar=cal, sigma=-0.1)


# --- plans ----------------------------------------------------------------------------------


def bath(key="he", name="LHe", **kw) -> cg.CryostatPlanInput:
    values = dict(
        capacity_l=12.0, minimum_l=2.0, level_now_l=8.0, rate_l_per_day=3.0,
        rate_uncertainty_l_per_day=0.1, price_per_l=15.0,
    )  # fmt: skip
    values.update(kw)
    return cg.CryostatPlanInput(key=key, name=name, **values)


def simulate_plan(plan: cg.Plan, inputs, now: datetime, until: datetime) -> dict[str, float]:
    """Integrate each bath at its worst-case rate through the plan; return the lowest level
    seen by each (an independent check of the invariant)."""
    lowest = {}
    for item in inputs:
        worst = item.rate_l_per_day + 2 * item.rate_uncertainty_l_per_day
        fill_to = item.capacity_l if item.fill_to_l is None else item.fill_to_l
        level, t = item.level_now_l, now
        low = level
        for r in [r for r in plan.refills if r.cryostat == item.key]:
            assert r.at >= t
            level -= worst * (r.at - t).total_seconds() / 86_400
            assert r.level_before_l == pytest.approx(level, abs=1e-9)
            low = min(low, level)
            level += r.amount_l
            assert level == pytest.approx(fill_to)
            t = r.at
        level -= worst * (until - t).total_seconds() / 86_400
        lowest[item.key] = min(low, level)
    return lowest


def test_plan_over_a_long_weekend_for_helium_and_nitrogen():
    cal = cg.LabCalendar(holidays=frozenset({WHIT_MONDAY}))
    inputs = [
        bath(),
        bath("n2", "LN2", capacity_l=25.0, minimum_l=5.0, level_now_l=20.0, rate_l_per_day=8.0,
             rate_uncertainty_l_per_day=0.2, price_per_l=0.5, loss_fraction=0.1,
             line_cooldown_l=2.0),
    ]  # fmt: skip
    plan = cg.plan_refills(inputs, now=FRIDAY, weeks=2, calendar=cal)
    until = FRIDAY + timedelta(weeks=2)
    lowest = simulate_plan(plan, inputs, FRIDAY, until)
    assert lowest["he"] >= 2.0 - 1e-9
    assert lowest["n2"] >= 5.0 - 1e-9
    # LN2 before LHe on every day with both in working hours
    days: dict[date, dict[str, list[datetime]]] = {}
    for r in plan.refills:
        if r.out_of_hours:
            continue
        days.setdefault(r.at.astimezone(BERLIN).date(), {}).setdefault(r.cryogen, []).append(r.at)
    both = [d for d, kinds in days.items() if len(kinds) == 2]
    assert both
    for d in both:
        assert max(days[d]["LN2"]) < min(days[d]["LHe"]), d
    # never on the holiday in hours (it is not a working day); out-of-hours ones are flagged
    for r in plan.refills:
        assert r.out_of_hours == (not cal.is_working(r.at))
    # order litres, order-by dates (numpy's business-day count) and cost
    for r, item in [(r, next(i for i in inputs if i.key == r.cryostat)) for r in plan.refills]:
        assert r.order_l == pytest.approx(
            r.amount_l / (1 - item.loss_fraction) + item.line_cooldown_l
        )
        assert r.cost == pytest.approx(r.order_l * item.price_per_l)
        assert np.busday_count(
            np.datetime64(r.order_by), np.datetime64(r.at.astimezone(BERLIN).date()),
            holidays=[np.datetime64(WHIT_MONDAY)],
        ) == 5  # fmt: skip
        assert cal.is_working_day(r.order_by)
    for name in ("LHe", "LN2"):
        assert plan.total_order_l[name] == pytest.approx(
            sum(r.order_l for r in plan.refills if r.cryogen == name)
        )
    assert plan.cost == pytest.approx(sum(r.cost for r in plan.refills))
    # the first helium refill is the Friday one the forecast recommends
    f = lhe_forecast(FRIDAY, 8.0, calendar=cal)
    first_he = next(r for r in plan.refills if r.cryogen == "LHe")
    assert first_he.at == f.recommended_refill_at


def test_order_litres():
    # 20 % loss and 1 L for the line: 8 L in the bath needs 8 / 0.8 + 1 = 11 L
    assert cg.order_litres(8.0, 0.2, 1.0) == pytest.approx(11.0)
    assert cg.order_litres(0.0, 0.3, 1.5) == pytest.approx(1.5)
    with pytest.raises(ScienceInputError, match="loss_fraction must be below 1"):
        cg.order_litres(8.0, 1.0, 1.0)
    with pytest.raises(ScienceInputError, match="amount_l"):
        cg.order_litres(-1.0, 0.2, 1.0)


def test_bad_plan_inputs_are_named():
    cal = cg.LabCalendar()
    with pytest.raises(ScienceInputError, match="capacity_l must be greater than zero"):
        cg.plan_refills([bath(capacity_l=-5.0)], now=FRIDAY, weeks=1, calendar=cal)
    with pytest.raises(ScienceInputError, match="unknown cryogen 'LH2'"):
        cg.plan_refills([bath(name="LH2")], now=FRIDAY, weeks=1, calendar=cal)
    with pytest.raises(ScienceInputError, match="fill_to_l"):
        cg.plan_refills([bath(fill_to_l=20.0)], now=FRIDAY, weeks=1, calendar=cal)
    with pytest.raises(ScienceInputError, match="weeks"):
        cg.plan_refills([bath()], now=FRIDAY, weeks=0, calendar=cal)
    with pytest.raises(ScienceInputError, match="keys must be unique"):
        cg.plan_refills([bath(), bath()], now=FRIDAY, weeks=1, calendar=cal)
    with pytest.raises(ScienceInputError, match="within the .* margin"):
        cg.plan_refills([bath(rate_l_per_day=40.0)], now=FRIDAY, weeks=1, calendar=cal)
    with pytest.raises(ScienceInputError, match="rate_l_per_day"):
        cg.plan_refills([bath(rate_l_per_day=float("nan"))], now=FRIDAY, weeks=1, calendar=cal)


weekday_sets = st.sampled_from([(0, 1, 2, 3, 4), (0, 1, 2, 3, 4, 5), (1, 2, 3), (0, 2, 4)])


@st.composite
def plan_cases(draw):
    tz = draw(st.sampled_from(["Europe/Berlin", "America/New_York", "Asia/Tokyo", "UTC"]))
    start_day = date(2026, 1, 1) + timedelta(days=draw(st.integers(0, 364)))
    holidays = frozenset(
        start_day + timedelta(days=d) for d in draw(st.sets(st.integers(0, 60), max_size=8))
    )
    calendar = cg.LabCalendar(
        tz=tz,
        working_days=draw(weekday_sets),
        day_start=time(draw(st.integers(6, 10))),
        day_end=time(draw(st.integers(15, 20))),
        holidays=holidays,
    )
    now = datetime.combine(start_day, time(0), tzinfo=ZoneInfo(tz)) + timedelta(
        minutes=draw(st.integers(0, 24 * 60 - 1))
    )
    margin_h = draw(st.floats(0.0, 24.0))
    inputs = []
    for k in range(draw(st.integers(1, 3))):
        name = draw(st.sampled_from(["LHe", "LN2"]))
        capacity = draw(st.floats(3.0, 60.0))
        minimum = draw(st.floats(0.0, 0.5)) * capacity
        fill_to = draw(st.floats(minimum + 0.3 * (capacity - minimum), capacity))
        level = draw(st.floats(minimum, capacity))
        sigma = draw(st.floats(0.0, 0.5))
        # a bath that lasts at least margin + 2 h when full, at the worst case
        max_rate = (fill_to - minimum) / ((margin_h + 2) / 24) - 2 * sigma
        rate = draw(st.floats(-0.5, max(0.1, min(max_rate, 30.0))))
        inputs.append(
            cg.CryostatPlanInput(
                key=f"c{k}", name=name, capacity_l=capacity, minimum_l=minimum,
                level_now_l=level, rate_l_per_day=rate, rate_uncertainty_l_per_day=sigma,
                fill_to_l=fill_to, price_per_l=draw(st.floats(0.0, 30.0)),
            )
        )  # fmt: skip
    weeks = draw(st.integers(1, 6))
    return inputs, now, weeks, calendar, margin_h


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(plan_cases())
def test_no_plan_lets_the_level_cross_the_minimum(case):
    inputs, now, weeks, calendar, margin_h = case
    try:
        plan = cg.plan_refills(inputs, now=now, weeks=weeks, calendar=calendar, margin_h=margin_h)
    except ScienceInputError as error:
        # only a bath that cannot last the margin when full may be refused
        assert "within the" in str(error)
        return
    until = now + timedelta(weeks=weeks)
    lowest = simulate_plan(plan, inputs, now, until)
    for item in inputs:
        assert lowest[item.key] >= item.minimum_l - 1e-9, item
    for r in plan.refills:
        assert now <= r.at <= until
        assert r.out_of_hours == (not calendar.is_working(r.at))
        assert r.amount_l >= 0
