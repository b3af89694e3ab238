"""Cryogen constants, level calibration, refill detection and boil-off rate fits.

Constants are checked against CoolProp's equations of state (He: Ortiz-Vega et al. 2019; N2:
Span et al., J. Phys. Chem. Ref. Data 29, 1361 (2000)) and the worked numbers of
/work/shared/REFERENCES.md §1 and §10; Theil–Sen slopes against scipy.stats.theilslopes.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from CoolProp.CoolProp import PropsSI
from scipy import stats

from labbook.science import cryogen as cg
from labbook.science.errors import ScienceInputError

ATM = 101_325.0
FLUID = {"LHe": "Helium", "LN2": "Nitrogen"}
# REFERENCES.md suggests 1 % for helium (equations of state differ by about that) and 0.3 % for
# nitrogen.
TOLERANCE = {"LHe": 0.01, "LN2": 0.003}
T0 = 1_767_225_600.0  # 2026-01-01 00:00 UTC


# --- constants against CoolProp -------------------------------------------------------------


@pytest.mark.parametrize("name", ["LHe", "LN2"])
def test_cryogen_constants_agree_with_coolprop(name):
    fluid, rel = FLUID[name], TOLERANCE[name]
    props = cg.cryogen(name)
    rho_l = PropsSI("D", "P", ATM, "Q", 0, fluid)
    rho_v = PropsSI("D", "P", ATM, "Q", 1, fluid)
    latent = PropsSI("H", "P", ATM, "Q", 1, fluid) - PropsSI("H", "P", ATM, "Q", 0, fluid)
    gas_15c = PropsSI("D", "T", 288.15, "P", ATM, fluid)
    assert props.boiling_point_k == pytest.approx(PropsSI("T", "P", ATM, "Q", 0, fluid), rel=rel)
    assert props.liquid_density_kg_m3 == pytest.approx(rho_l, rel=rel)
    assert props.vapour_density_kg_m3 == pytest.approx(rho_v, rel=rel)
    assert props.latent_heat_j_kg == pytest.approx(latent, rel=rel)
    assert props.expansion_ratio_15c == pytest.approx(rho_l / gas_15c, rel=rel)


@pytest.mark.parametrize("name", ["LHe", "LN2"])
def test_heat_load_is_rate_times_density_times_latent_heat_from_coolprop(name):
    fluid = FLUID[name]
    rho_l = PropsSI("D", "P", ATM, "Q", 0, fluid)
    latent = PropsSI("H", "P", ATM, "Q", 1, fluid) - PropsSI("H", "P", ATM, "Q", 0, fluid)
    # 1 L/day = 1e-3 m³ per 86 400 s
    expected = 1e-3 * rho_l * latent / 86_400
    assert cg.heat_load_w(1.0, name) == pytest.approx(expected, rel=TOLERANCE[name])
    rates = np.array([0.0, 1.0, 2.5, 10.0])
    np.testing.assert_allclose(cg.heat_load_w(rates, name), rates * expected, rtol=TOLERANCE[name])


def test_heat_load_rule_of_thumb_one_watt_boils_1_404_litres_of_helium_an_hour():
    # REFERENCES.md §1: 1 W -> 1.404 L/h LHe (33.7 L/day); 1 L/day LHe ≙ 29.7 mW and
    # 1 L/day LN2 ≙ 1.858 W (CoolProp numbers printed to 3-4 figures).
    assert cg.heat_load_w(1.404 * 24, "LHe") == pytest.approx(1.0, rel=1e-3)
    assert cg.heat_load_w(1.0, "LHe") == pytest.approx(0.0297, rel=2e-3)
    assert cg.heat_load_w(1.0, "LN2") == pytest.approx(1.858, rel=1e-3)
    # REFERENCES.md §8: 4 L LHe lasting 72 h is 39.6 mW.
    assert cg.heat_load_w(4.0 / 3.0, "LHe") == pytest.approx(0.0396, rel=2e-3)


def test_unknown_cryogen_is_named():
    with pytest.raises(ScienceInputError, match="unknown cryogen 'LAr'"):
        cg.cryogen("LAr")
    with pytest.raises(ScienceInputError, match="unknown cryogen"):
        cg.heat_load_w(1.0, "helium")


# --- oxygen and recovery --------------------------------------------------------------------


def test_worst_case_oxygen_worked_case_by_hand():
    # REFERENCES.md §10: O2 % = 20.9 × (V_room − V_gas)/V_room, V_gas = liquid × expansion
    # ratio at 15 °C. By hand, with the §1 ratio 680.2 for LN2: a 10 L transfer dewar in a
    # 40 m³ room gives V_gas = 10 × 680.2 L = 6.802 m³ and
    # 20.9 × (40 − 6.802)/40 = 20.9 × 0.82995 = 17.35 %, below OSHA's 19.5 %.
    assert cg.worst_case_oxygen_percent(40.0, 10.0, "LN2") == pytest.approx(17.35, abs=0.01)
    assert cg.worst_case_oxygen_percent(40.0, 10.0, "LN2") < cg.OXYGEN_DEFICIENT_PERCENT
    # LHe, ratio 736.8: 5 L in 30 m³ -> V_gas 3.684 m³, 20.9 × 26.316/30 = 18.33 %.
    assert cg.worst_case_oxygen_percent(30.0, 5.0, "LHe") == pytest.approx(18.33, abs=0.01)


@pytest.mark.parametrize("name", ["LHe", "LN2"])
def test_worst_case_oxygen_with_the_coolprop_expansion_ratio(name):
    fluid = FLUID[name]
    ratio = PropsSI("D", "P", ATM, "Q", 0, fluid) / PropsSI("D", "T", 288.15, "P", ATM, fluid)
    room, liquid = 60.0, 25.0
    expected = 20.9 * (room - liquid * ratio / 1000) / room
    assert cg.worst_case_oxygen_percent(room, liquid, name) == pytest.approx(expected, rel=1e-3)


def test_worst_case_oxygen_bounds():
    assert cg.worst_case_oxygen_percent(50.0, 0.0, "LHe") == pytest.approx(20.9)
    # 100 L of LHe gives 73.7 m³ of gas, more than the room: no oxygen left, not a negative %.
    assert cg.worst_case_oxygen_percent(50.0, 100.0, "LHe") == 0.0
    with pytest.raises(ScienceInputError, match="room_volume_m3"):
        cg.worst_case_oxygen_percent(0.0, 1.0, "LN2")
    with pytest.raises(ScienceInputError, match="liquid_l"):
        cg.worst_case_oxygen_percent(10.0, -1.0, "LN2")


def test_helium_recovery_uses_637_litres_of_gas_per_litre_not_737():
    # REFERENCES.md §1: a litre of liquid lost vents (ρ_l − ρ_v) of gas, 637 L at 15 °C.
    rho_l = PropsSI("D", "P", ATM, "Q", 0, "Helium")
    rho_v = PropsSI("D", "P", ATM, "Q", 1, "Helium")
    gas_15c = PropsSI("D", "T", 288.15, "P", ATM, "Helium")
    per_litre = (rho_l - rho_v) / gas_15c
    assert per_litre == pytest.approx(637, abs=0.5)
    assert cg.recovered_liquid_equivalent_l(per_litre / 1000 * 40) == pytest.approx(40, rel=1e-3)
    assert cg.recovered_liquid_equivalent_l(0.637) == pytest.approx(1.0, rel=1e-3)
    assert cg.recovery_fraction(46.5, 50.0) == pytest.approx(0.93)
    with pytest.raises(ScienceInputError, match="consumed_liquid_l"):
        cg.recovery_fraction(1.0, 0.0)
    with pytest.raises(ScienceInputError, match="gas_m3_at_15c"):
        cg.recovered_liquid_equivalent_l(float("nan"))


def test_rate_rise_alert_fires_above_1_3_times_the_trailing_median():
    steady = [3.0, 3.1, 2.9, 3.0, 3.05]
    assert not cg.rate_rise_alert(np.array([*steady, 3.8]))  # +27 %
    assert cg.rate_rise_alert(np.array([*steady, 4.0]))  # +33 %
    # only the trailing window counts: an old high rate does not raise the median
    assert cg.rate_rise_alert(np.array([9.0, 9.0, 9.0, *steady, 4.0]), window=5)
    assert not cg.rate_rise_alert(np.array([3.0]))
    with pytest.raises(ScienceInputError, match="rates is empty"):
        cg.rate_rise_alert(np.array([]))
    with pytest.raises(ScienceInputError, match="NaN"):
        cg.rate_rise_alert(np.array([3.0, math.nan]))


# --- level calibration ----------------------------------------------------------------------


def test_linear_calibration():
    cal = cg.LevelCalibration.linear(0.5, 12.5)
    assert cal.to_litres(0.0) == pytest.approx(0.5)
    assert cal.to_litres(50.0) == pytest.approx(6.5)
    assert cal.to_litres(100.0) == pytest.approx(12.5)
    np.testing.assert_allclose(cal.to_litres(np.array([25.0, 75.0])), [3.5, 9.5])
    assert isinstance(cal.to_litres(10.0), float)


def test_table_calibration_interpolates_and_extrapolates_along_the_end_segments():
    # a bath with a narrow neck: litres per cm fall at the top
    cal = cg.LevelCalibration(((0.0, 1.0), (10.0, 6.0), (20.0, 11.0), (30.0, 12.0)))
    assert cal.to_litres(5.0) == pytest.approx(3.5)
    assert cal.to_litres(25.0) == pytest.approx(11.5)
    assert cal.to_litres(32.0) == pytest.approx(12.2)  # 0.1 L/cm beyond the top point
    assert cal.to_litres(-2.0) == pytest.approx(0.0)  # 0.5 L/cm below the first point


@pytest.mark.parametrize(
    ("points", "problem"),
    [
        (((0.0, 1.0),), "at least 2 points"),
        (((0.0, 1.0), (0.0, 2.0)), "strictly increasing"),
        (((10.0, 1.0), (5.0, 2.0)), "strictly increasing"),
        (((0.0, 5.0), (10.0, 2.0)), "must not decrease"),
        (((0.0, math.nan), (10.0, 2.0)), "NaN"),
        (((0.0, -1.0), (10.0, 2.0)), "negative"),
    ],
)
def test_bad_calibrations_are_refused(points, problem):
    with pytest.raises(ScienceInputError, match=problem):
        cg.LevelCalibration(points)


def test_bad_linear_calibration():
    with pytest.raises(ScienceInputError, match="litres_at_full"):
        cg.LevelCalibration.linear(5.0, 5.0)
    with pytest.raises(ScienceInputError, match="litres_at_zero"):
        cg.LevelCalibration.linear(-1.0, 5.0)


# --- synthetic level logs -------------------------------------------------------------------


def synthetic_log(
    *,
    rates: list[float],
    hold_days: float,
    capacity: float = 12.0,
    dt: float = 60.0,
    fill_minutes: float = 30.0,
    noise: float = 0.03,
    spikes: int = 0,
    spike_pairs: int = 0,
    seed: int = 1,
):
    """A bath boiling off at ``rates[k]`` L/day in segment k, refilled to capacity every
    ``hold_days``; the refill takes ``fill_minutes``. Returns t, level, the refill start
    times and the indices of the planted outliers."""
    rng = np.random.default_rng(seed)
    seg_n = int(hold_days * 86_400 / dt)
    fill_n = max(1, int(fill_minutes * 60 / dt))
    parts, refill_times = [], []
    t_cursor = 0
    for k, rate in enumerate(rates):
        steps = np.arange(seg_n)
        parts.append(capacity - rate * steps * dt / 86_400)
        t_cursor += seg_n
        if k < len(rates) - 1:
            low = capacity - rate * seg_n * dt / 86_400
            refill_times.append(T0 + (t_cursor - 1) * dt)
            parts.append(np.linspace(low, capacity, fill_n + 2)[1:-1])
            t_cursor += fill_n
    level = np.concatenate(parts)
    t = T0 + np.arange(level.size) * dt
    level = level + rng.normal(0.0, noise, level.size)
    planted = []
    if spikes:
        idx = rng.choice(np.arange(3, level.size - 3), spikes, replace=False)
        level[idx] += rng.choice([-1.0, 1.0], spikes) * rng.uniform(3.0, 9.0, spikes)
        planted.extend(idx.tolist())
    if spike_pairs:
        idx = rng.choice(np.arange(3, level.size - 4), spike_pairs, replace=False)
        jump = rng.uniform(3.0, 9.0, spike_pairs)
        level[idx] += jump
        level[idx + 1] += jump
        planted.extend(idx.tolist())
    return t, level, np.array(refill_times), planted


def test_rate_and_every_refill_from_a_noisy_log_with_outliers():
    rates = [3.0, 3.2, 2.9, 3.5, 3.1, 4.4, 3.0, 3.3]
    t, level, refill_times, _ = synthetic_log(
        rates=rates, hold_days=3.0, spikes=300, spike_pairs=60, noise=0.04
    )
    analysis = cg.analyse(t, level, min_rise_l=3.0)
    starts = np.array([r.t_start for r in analysis.refills])
    assert len(analysis.refills) == len(refill_times)  # every refill, no false one
    np.testing.assert_allclose(starts, refill_times, atol=15 * 60)
    assert len(analysis.segments) == len(rates)
    for segment, rate in zip(analysis.segments, rates, strict=True):
        assert segment.rate_l_per_day == pytest.approx(rate, rel=0.02)
        assert 0 < segment.rate_uncertainty_l_per_day < 0.02 * rate
    assert analysis.rate_l_per_day == pytest.approx(rates[-1], rel=0.02)
    # the last reading is 3 days after the fill: 12 − 3.3 × 3 = 2.1 L, from the fitted line
    assert analysis.level_now_l == pytest.approx(analysis.segments[-1].level_at_end_l, abs=1e-12)
    assert analysis.level_now_l == pytest.approx(12.0 - 3.3 * 3.0, abs=0.05)
    assert analysis.t_now == t[-1]
    # the fitted segment starts an hour after the refill (the bath settles)
    assert analysis.segments[-1].t_start - analysis.refills[-1].t_end == pytest.approx(3600, abs=60)


def test_noise_spikes_larger_than_the_threshold_are_no_refills():
    # One segment, no refill at all, but 500 single and 200 paired outliers of 3-9 L against a
    # minimum rise of 2 L.
    t, level, _, planted = synthetic_log(
        rates=[3.0], hold_days=4.0, spikes=500, spike_pairs=200, seed=5
    )
    assert np.ptp(level) > 9
    assert len(planted) == 700
    assert cg.detect_refills(t, level, min_rise_l=2.0) == []


def test_a_burst_of_three_bad_readings_that_comes_back_down_is_no_refill():
    t, level, _, _ = synthetic_log(rates=[3.0], hold_days=2.0, seed=8)
    level[1000:1003] += 6.0
    level[2000:2004] += 6.0
    assert cg.detect_refills(t, level, min_rise_l=2.0) == []


def test_refills_in_a_log_read_once_an_hour():
    # Level meters are often read only intermittently (FIELD.md §3): one reading an hour, the
    # refill falls between two readings.
    t, level, refill_times, _ = synthetic_log(
        rates=[2.0, 2.5, 2.2], hold_days=4.0, dt=3600.0, fill_minutes=30, noise=0.02
    )
    refills = cg.detect_refills(t, level, min_rise_l=3.0)
    assert len(refills) == 2
    np.testing.assert_allclose([r.t_start for r in refills], refill_times, atol=3600)
    segments = cg.fit_segments(t, level, refills, min_points=20)
    assert [s.rate_l_per_day for s in segments] == pytest.approx([2.0, 2.5, 2.2], rel=0.02)


def test_logged_refills_merge_with_detected_ones_and_stand_alone_ones_split_segments():
    t, level, refill_times, _ = synthetic_log(rates=[3.0, 3.0], hold_days=2.0, seed=11)
    # a hand-logged time 20 min after the detected refill, and a small top-up that the level
    # meter missed (no jump) on the second day of the second segment
    top_up = float(t[-1] - 86_400)
    refills = cg.detect_refills(
        t, level, min_rise_l=3.0, logged_times=[refill_times[0] + 1200, top_up]
    )
    assert len(refills) == 2
    assert all(r.logged for r in refills)
    assert refills[0].t_start == pytest.approx(refill_times[0], abs=900)
    assert refills[1].t_start <= top_up < refills[1].t_start + 61
    assert refills[0].level_after_l - refills[0].level_before_l == pytest.approx(6.0, abs=0.2)
    segments = cg.fit_segments(t, level, refills)
    assert len(segments) == 3
    # far from the data: ignored
    assert len(cg.detect_refills(t, level, min_rise_l=3.0, logged_times=[T0 - 10 * 86_400])) == 1


def test_interrupted_transfer_is_one_refill():
    t, level, _, _ = synthetic_log(rates=[3.0], hold_days=2.0, seed=2, noise=0.02)
    # two rises of 3 L, 20 min apart (the storage dewar swapped mid-transfer)
    level[1500:] += 3.0
    level[1520:] += 3.0
    refills = cg.detect_refills(t, level, min_rise_l=2.5)
    assert len(refills) == 1
    assert refills[0].level_after_l - refills[0].level_before_l == pytest.approx(6.0, abs=0.1)


def test_theil_sen_agrees_with_scipy():
    rng = np.random.default_rng(3)
    # 40 readings: all 780 pairs are used, so the slope is the exact Theil–Sen estimator
    t = T0 + np.sort(rng.uniform(0, 86_400, 40))
    y = 10.0 - 3.0 * (t - T0) / 86_400 + rng.normal(0, 0.05, t.size)
    y[[5, 17]] += 4.0
    (segment,) = cg.fit_segments(t, y, [], min_points=20)
    reference = stats.theilslopes(y, t)
    assert -segment.rate_l_per_day / 86_400 == pytest.approx(reference.slope, rel=1e-12)
    # 2000 readings: a seeded draw of pairs gives the all-pairs slope to well within the
    # reported uncertainty
    t = T0 + np.arange(2000) * 60.0
    y = 10.0 - 3.0 * (t - T0) / 86_400 + rng.normal(0, 0.05, t.size)
    (segment,) = cg.fit_segments(t, y, [], min_points=20)
    full = stats.theilslopes(y, t).slope * 86_400
    assert -segment.rate_l_per_day == pytest.approx(
        full, abs=0.5 * segment.rate_uncertainty_l_per_day
    )
    again = cg.fit_segments(t, y, [], min_points=20)[0]
    assert again == segment  # deterministic


def test_rate_uncertainty_matches_the_scatter_of_repeated_fits():
    # 300 stretches of 2 days at one reading every 5 min, noise 0.05 L, in one log with a
    # refill between each: the standard deviation of the fitted rates is what the reported
    # 1-sigma should be. The earlier segments are fitted from 1025 drawn pairs, the last from
    # many more; both must report their own scatter.
    rng = np.random.default_rng(21)
    n, count = 576, 300
    x = np.arange(n) * 300.0
    y = np.concatenate([12.0 - 3.0 * x / 86_400 + rng.normal(0, 0.05, n) for _ in range(count)])
    t = T0 + np.arange(n * count) * 300.0
    refills = [
        cg.Refill(k * n - 1, k * n, t[k * n - 1], t[k * n], 10.3, 12.0) for k in range(1, count)
    ]
    segments = cg.fit_segments(t, y, refills, settle_s=0.0)
    assert [s.n for s in segments] == [n - 1] + [n - 2] * (count - 2) + [n - 1]
    fitted = np.array([s.rate_l_per_day for s in segments])
    reported = np.array([s.rate_uncertainty_l_per_day for s in segments])
    assert fitted.mean() == pytest.approx(3.0, rel=2e-3)
    assert float(np.median(reported)) == pytest.approx(float(np.std(fitted, ddof=1)), rel=0.15)

    last_fitted, last_reported = [], []
    for _ in range(200):
        y = 12.0 - 3.0 * x / 86_400 + rng.normal(0, 0.05, n)
        (segment,) = cg.fit_segments(T0 + x, y, [], min_points=20)
        last_fitted.append(segment.rate_l_per_day)
        last_reported.append(segment.rate_uncertainty_l_per_day)
    scatter = float(np.std(last_fitted, ddof=1))
    assert float(np.median(last_reported)) == pytest.approx(scatter, rel=0.2)
    # and the last segment's rate is the better one: close to full Theil–Sen's efficiency
    assert scatter < 0.8 * float(np.std(fitted, ddof=1))


def test_rate_history():
    t, level, _, _ = synthetic_log(rates=[2.0, 3.0, 4.0], hold_days=2.0, seed=4)
    analysis = cg.analyse(t, level, min_rise_l=3.0)
    mid, rate, sigma = cg.rate_history(analysis.segments)
    assert np.all(np.diff(mid) > 0)
    np.testing.assert_allclose(rate, [2.0, 3.0, 4.0], rtol=0.02)
    assert np.all(sigma > 0)
    assert cg.rate_rise_alert(rate, window=2)


def test_level_now_just_after_a_refill_is_the_recent_readings():
    t, level, _, _ = synthetic_log(rates=[3.0], hold_days=2.0, seed=6, noise=0.02)
    level = np.concatenate([level, np.full(10, 11.9)])
    t = T0 + np.arange(level.size) * 60.0
    analysis = cg.analyse(t, level, min_rise_l=3.0)
    assert len(analysis.refills) == 1
    assert analysis.level_now_l == pytest.approx(11.9)
    assert analysis.rate_l_per_day == pytest.approx(3.0, rel=0.02)  # the last fitted segment


# --- bad input ------------------------------------------------------------------------------


def test_bad_series_are_refused_with_the_problem_named():
    t = T0 + np.arange(100) * 60.0
    level = 10.0 - np.arange(100) * 0.001
    with pytest.raises(ScienceInputError, match="empty"):
        cg.analyse(np.array([]), np.array([]), min_rise_l=1.0)
    with pytest.raises(ScienceInputError, match="strictly increasing"):
        cg.detect_refills(t[::-1], level, min_rise_l=1.0)
    shuffled = t.copy()
    shuffled[[10, 11]] = shuffled[[11, 10]]
    with pytest.raises(ScienceInputError, match="index 11"):
        cg.fit_segments(shuffled, level, [])
    bad = level.copy()
    bad[42] = np.nan
    with pytest.raises(ScienceInputError, match="first at index 42"):
        cg.analyse(t, bad, min_rise_l=1.0)
    with pytest.raises(ScienceInputError, match="NaN or infinite instants"):
        cg.detect_refills(np.where(np.arange(100) == 3, np.nan, t), level, min_rise_l=1.0)
    with pytest.raises(ScienceInputError, match="differ in length"):
        cg.detect_refills(t, level[:-1], min_rise_l=1.0)
    with pytest.raises(ScienceInputError, match="min_rise_l"):
        cg.detect_refills(t, level, min_rise_l=-1.0)
    with pytest.raises(ScienceInputError, match="logged_times"):
        cg.detect_refills(t, level, min_rise_l=1.0, logged_times=[math.nan])
    with pytest.raises(ScienceInputError, match="to fit a boil-off rate"):
        cg.analyse(t[:10], level[:10], min_rise_l=1.0)
    with pytest.raises(ScienceInputError, match="outside the"):
        cg.fit_segments(t, level, [cg.Refill(90, 120, t[90], t[-1], 1.0, 5.0)])
