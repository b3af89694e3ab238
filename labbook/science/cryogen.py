"""Cryogen bookkeeping for bath cryostats: boil-off rates, forecasts and refill plans.

A cryostat's level channel gives litres against time. Between refills the bath boils off at a
nearly constant rate; a refill is a jump up of many litres within minutes. From the log this
module finds the refills (:func:`detect_refills`), fits a robust straight line to every stretch
between them (:func:`fit_segments`, Theil–Sen), and from the latest rate forecasts when the
minimum safe level is reached and which working slot of the lab's calendar to refill in
(:func:`forecast`). :func:`plan_refills` repeats that over weeks for several cryostats and
prices the helium and nitrogen to order.

Times are numpy float64 arrays of POSIX seconds (UTC); datetimes are timezone-aware. Levels are
litres of liquid, rates litres per day with consumption positive.

Pure numpy and the standard library: no Django.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, time, timedelta
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np

from labbook.science.errors import (
    ScienceInputError,
    UnknownNameError,
    require_finite,
    require_non_negative,
    require_positive,
)

SECONDS_PER_DAY = 86_400.0

# --- cryogen properties ---------------------------------------------------------------------


@dataclass(frozen=True)
class CryogenProperties:
    """A cryogen boiling at 1 atm (101 325 Pa)."""

    name: str
    boiling_point_k: float
    liquid_density_kg_m3: float
    vapour_density_kg_m3: float
    latent_heat_j_kg: float
    expansion_ratio_15c: float  # litres of gas at 15 °C, 101.325 kPa per litre of liquid

    @property
    def vented_gas_l_per_liquid_l_15c(self) -> float:
        """Litres of gas (15 °C, 1 atm) that leave the vessel per litre of liquid boiled off.

        Less than the expansion ratio: the saturated vapour left behind fills the volume the
        liquid vacated, so only (ρ_l − ρ_v) per litre goes out of the vent (Cha et al.,
        Cryogenics 33, 675 (1993)). For helium this is 637, not 737 (REFERENCES.md §1).
        """
        gas_density_15c = self.liquid_density_kg_m3 / self.expansion_ratio_15c
        return (self.liquid_density_kg_m3 - self.vapour_density_kg_m3) / gas_density_15c


# Saturated liquid and vapour at 101 325 Pa from CoolProp 6 (He: Ortiz-Vega et al. 2019 EOS; N2:
# Span et al., J. Phys. Chem. Ref. Data 29, 1361 (2000)), as listed in REFERENCES.md §1; the gas
# density at 15 °C for the expansion ratio from the same equations of state.
CRYOGENS: dict[str, CryogenProperties] = {
    "LHe": CryogenProperties(
        name="LHe",
        boiling_point_k=4.2238,
        liquid_density_kg_m3=124.669,
        vapour_density_kg_m3=16.903,
        latent_heat_j_kg=20_564.4,
        expansion_ratio_15c=736.84,
    ),
    "LN2": CryogenProperties(
        name="LN2",
        boiling_point_k=77.355,
        liquid_density_kg_m3=806.085,
        vapour_density_kg_m3=4.6121,
        latent_heat_j_kg=199_176.0,
        expansion_ratio_15c=680.18,
    ),
}

OXYGEN_DEFICIENT_PERCENT = 19.5  # OSHA 29 CFR 1910.134, "oxygen deficient atmosphere"
AIR_OXYGEN_PERCENT = 20.9  # dry air by volume (REFERENCES.md §10)


def cryogen(name: str) -> CryogenProperties:
    """The properties of cryogen ``name`` ("LHe" or "LN2")."""
    try:
        return CRYOGENS[name]
    except (KeyError, TypeError):
        known = ", ".join(CRYOGENS)
        raise UnknownNameError(
            f"unknown cryogen {name!r}; known: {known}", argument="name"
        ) from None


def heat_load_w(rate_l_per_day: float | np.ndarray, name: str) -> float | np.ndarray:
    """Heat reaching the bath (W) that boils off ``rate_l_per_day`` litres of liquid a day.

    Q = rate × ρ_l × L. An energy balance of the bath at constant pressure gives exactly
    ρ_l·L per volume of level lost: the enthalpy carried out by the vented gas and the internal
    energy of the vapour that fills the vacated volume cancel the p·V terms. For LHe this is
    1 W per 1.404 L/h (REFERENCES.md §1).
    """
    props = cryogen(name)
    per_litre_j = props.liquid_density_kg_m3 * 1e-3 * props.latent_heat_j_kg
    if np.ndim(rate_l_per_day) == 0:
        rate = require_finite(float(rate_l_per_day), "rate_l_per_day")
        return rate * per_litre_j / SECONDS_PER_DAY
    rates = np.asarray(rate_l_per_day, dtype=float)
    if not np.all(np.isfinite(rates)):
        raise ScienceInputError(
            "rate_l_per_day holds NaN or infinite values", argument="rate_l_per_day"
        )
    return rates * (per_litre_j / SECONDS_PER_DAY)


# --- level calibration ----------------------------------------------------------------------


@dataclass(frozen=True)
class LevelCalibration:
    """Level-meter reading (% or cm of the sensor) to litres of liquid.

    ``points`` are (reading, litres) pairs in strictly increasing reading; between them the
    litres are interpolated linearly, beyond the ends extrapolated along the end segments (a
    table rarely covers the last few % of a sensor, and clipping would hide a full bath).
    """

    points: tuple[tuple[float, float], ...]

    def __post_init__(self) -> None:
        try:
            pairs = tuple((float(r), float(v)) for r, v in self.points)
        except (TypeError, ValueError):
            raise ScienceInputError(
                "points must be (reading, litres) pairs of numbers", argument="points"
            ) from None
        if len(pairs) < 2:
            raise ScienceInputError(
                f"a level calibration needs at least 2 points, got {len(pairs)}",
                argument="points",
            )
        values = np.array(pairs)
        if not np.all(np.isfinite(values)):
            raise ScienceInputError("points hold NaN or infinite numbers", argument="points")
        if np.any(np.diff(values[:, 0]) <= 0):
            raise ScienceInputError(
                "calibration readings must be strictly increasing", argument="points"
            )
        if np.any(np.diff(values[:, 1]) < 0):
            raise ScienceInputError(
                "calibration litres must not decrease as the reading rises", argument="points"
            )
        if np.any(values[:, 1] < 0):
            raise ScienceInputError("calibration litres must not be negative", argument="points")
        object.__setattr__(self, "points", pairs)

    @classmethod
    def linear(
        cls, litres_at_zero: float, litres_at_full: float, full_reading: float = 100.0
    ) -> LevelCalibration:
        """A linear sensor: ``litres_at_zero`` at reading 0 (liquid below the sensor's active
        length) and ``litres_at_full`` at ``full_reading``."""
        zero = require_non_negative(litres_at_zero, "litres_at_zero")
        full = require_positive(litres_at_full, "litres_at_full")
        top = require_positive(full_reading, "full_reading")
        if full <= zero:
            raise ScienceInputError(
                f"litres_at_full ({full}) must exceed litres_at_zero ({zero})",
                argument="litres_at_full",
            )
        return cls(((0.0, zero), (top, full)))

    def to_litres(self, reading: np.ndarray | float) -> np.ndarray | float:
        """Litres for ``reading`` (a number or an array of readings)."""
        xs = np.array([p[0] for p in self.points])
        ys = np.array([p[1] for p in self.points])
        values = np.asarray(reading, dtype=float)
        if not np.all(np.isfinite(values)):
            raise ScienceInputError("reading holds NaN or infinite values", argument="reading")
        litres = np.interp(values, xs, ys)
        low_slope = (ys[1] - ys[0]) / (xs[1] - xs[0])
        high_slope = (ys[-1] - ys[-2]) / (xs[-1] - xs[-2])
        litres = np.where(values < xs[0], ys[0] + (values - xs[0]) * low_slope, litres)
        litres = np.where(values > xs[-1], ys[-1] + (values - xs[-1]) * high_slope, litres)
        if np.ndim(reading) == 0:
            return float(litres)
        return litres


# --- input checks ---------------------------------------------------------------------------


def _series(t: object, level_l: object) -> tuple[np.ndarray, np.ndarray]:
    times = np.asarray(t, dtype=float)
    levels = np.asarray(level_l, dtype=float)
    if times.ndim != 1 or levels.ndim != 1:
        raise ScienceInputError("t and level_l must be one-dimensional arrays", argument="t")
    if times.size == 0:
        raise ScienceInputError("t is empty: no level readings", argument="t")
    if times.size != levels.size:
        raise ScienceInputError(
            f"t and level_l differ in length ({times.size} and {levels.size})",
            argument="level_l",
        )
    if not np.isfinite(times).all():
        raise ScienceInputError("t holds NaN or infinite instants", argument="t")
    bad = ~np.isfinite(levels)
    if bad.any():
        raise ScienceInputError(
            f"level_l holds {int(bad.sum())} NaN or infinite readings "
            f"(first at index {int(np.argmax(bad))}); leave them out before the analysis",
            argument="level_l",
        )
    # A series out of order is a caller's bug; sorting it here would hide that.
    if times.size > 1 and (times[1:] <= times[:-1]).any():
        first = int(np.argmax(times[1:] <= times[:-1])) + 1
        raise ScienceInputError(
            f"t must be strictly increasing (index {first} is not after the one before)",
            argument="t",
        )
    return times, levels


def _aware(value: object, name: str) -> datetime:
    if not isinstance(value, datetime):
        raise ScienceInputError(
            f"{name} must be a datetime, got {type(value).__name__}", argument=name
        )
    if value.tzinfo is None or value.utcoffset() is None:
        raise ScienceInputError(f"{name} must be timezone-aware, got {value!r}", argument=name)
    return value


# --- refills --------------------------------------------------------------------------------


@dataclass(frozen=True)
class Refill:
    """A refill seen in the level log (or logged by hand)."""

    start_index: int  # the last reading before the level rises
    end_index: int  # the reading at the top of the rise
    t_start: float
    t_end: float
    level_before_l: float
    level_after_l: float
    logged: bool = False  # True when it came from (or matched) a logged refill


def _median5(x: np.ndarray) -> np.ndarray:
    """Running median over 5 samples, by a min/max network (no sort, no Python loop).

    The median of (a, b, c, d, e) is the median of e, max(min(a,b), min(c,d)) and
    min(max(a,b), max(c,d)): the smallest and largest of a..d cannot be the median of five.
    The ends are padded by reflection, not by repeating the end value: repeating it would let
    a single spike in the last reading through as three votes.
    """
    if x.size < 5:
        return x.copy()
    p = np.pad(x, 2, mode="reflect")
    n = x.size
    a, b, c, d, e = p[0:n], p[1 : n + 1], p[3 : n + 3], p[4 : n + 4], p[2 : n + 2]
    lo_ab = np.minimum(a, b)
    hi_ab = np.maximum(a, b)
    lo_cd = np.minimum(c, d)
    hi_cd = np.maximum(c, d)
    f = np.maximum(lo_ab, lo_cd, out=lo_ab)
    g = np.minimum(hi_ab, hi_cd, out=hi_ab)
    # median of three (e, f, g) = max(min(f, g), min(max(f, g), e))
    lo = np.minimum(f, g, out=lo_cd)
    hi = np.maximum(f, g, out=hi_cd)
    np.minimum(hi, e, out=hi)
    return np.maximum(lo, hi, out=lo)


def detect_refills(
    t: np.ndarray,
    level_l: np.ndarray,
    *,
    min_rise_l: float,
    logged_times: Sequence[float] = (),
    merge_window_s: float = 3600.0,
    rise_window_s: float = 7200.0,
) -> list[Refill]:
    """Refills in a level log: rises of at least ``min_rise_l`` litres that stay up.

    Single readings and pairs of readings that jump (a noisy level meter, a sensor heater
    switching) are removed first by a running median over 5 readings. A candidate is a place
    where the filtered level climbs by half of ``min_rise_l`` within ``rise_window_s``; it is
    kept only if the median level over the readings after the rise is at least ``min_rise_l``
    above the median over the readings before it, so a burst of bad readings that comes back
    down is not a refill. Rises closer than ``merge_window_s`` are one refill (a transfer
    interrupted to swap the storage dewar).

    ``logged_times`` (POSIX s) are refills someone recorded. A detected refill within
    ``merge_window_s`` of one is marked ``logged``; a logged refill with no detected rise (a
    small top-up, a level meter that was off) still becomes a refill at that time, so the rate
    fits do not run across it. Logged times outside the span of the readings are left out.
    """
    times, levels = _series(t, level_l)
    rise = require_positive(min_rise_l, "min_rise_l")
    merge = require_non_negative(merge_window_s, "merge_window_s")
    window = require_positive(rise_window_s, "rise_window_s")
    logged = np.asarray(list(logged_times), dtype=float).ravel()
    if logged.size and not np.isfinite(logged).all():
        raise ScienceInputError(
            "logged_times holds NaN or infinite instants", argument="logged_times"
        )
    n = times.size
    refills: list[Refill] = []
    if n >= 2:
        filtered = _median5(levels)
        # The window as a number of readings at the typical spacing, not a time search per
        # reading: a gap in the log (logger off over a refill) then still shows as one jump.
        lag = _lag_samples(times, window)
        gain = filtered[lag:] - filtered[:-lag]
        candidates = np.flatnonzero(gain >= 0.5 * rise)
        if candidates.size:
            refills = _confirm_rises(times, filtered, lag, candidates, rise)
    refills = _merge_close(refills, merge)
    return _merge_logged(times, levels, refills, logged, merge)


def _lag_samples(times: np.ndarray, window_s: float) -> int:
    """``window_s`` as a number of readings at the typical (median) spacing, at least 1."""
    n = times.size
    step = max(1, (n - 1) // 4096)
    spacing = np.diff(times[::step]) / step if n > 2 * step else np.diff(times)
    typical = float(np.median(spacing)) if spacing.size else window_s
    return int(np.clip(round(window_s / typical) if typical > 0 else 1, 1, n - 1))


def _confirm_rises(
    times: np.ndarray,
    filtered: np.ndarray,
    lag: int,
    candidates: np.ndarray,
    rise: float,
) -> list[Refill]:
    n = times.size
    # Runs of consecutive candidate readings; each run is one rise (the loop below runs once a
    # refill, not once a reading).
    breaks = np.flatnonzero(np.diff(candidates) > 1)
    run_starts = np.concatenate(([candidates[0]], candidates[breaks + 1]))
    run_ends = np.concatenate((candidates[breaks], [candidates[-1]]))
    found: list[Refill] = []
    last_end = -1
    for r0, r1 in zip(run_starts.tolist(), run_ends.tolist(), strict=True):
        lo = max(r0, last_end + 1)
        hi = min(r1 + lag, n - 1)
        if hi <= lo:
            continue
        start = lo + int(np.argmin(filtered[lo : hi + 1]))
        end = start + int(np.argmax(filtered[start : hi + 1]))
        if end <= start:
            continue
        # The lowest and highest readings lie somewhere in the noise on the flat parts either
        # side; the rise itself runs from the last reading within 10 % of the climb above the
        # bottom to the first within 10 % of the top.
        climb = filtered[start : end + 1]
        low, high = float(climb[0]), float(climb[-1])
        tolerance = 0.1 * (high - low)
        start += int(np.flatnonzero(climb <= low + tolerance)[-1])
        end = start + int(np.argmax(filtered[start : end + 1] >= high - tolerance))
        if end <= start:
            continue
        # Compare the settled level on both sides: over as many readings as the rise took or a
        # quarter of the rise window (30 min by default), at least 5 and at most 240, so a
        # cluster of bad readings cannot carry the median, but the slow boil-off before and
        # after does not shift it by much.
        span = min(max(end - start, lag // 4, 5), 240)
        before = float(np.median(filtered[max(0, start - span) : start + 1]))
        after = float(np.median(filtered[end : min(n, end + span + 1)]))
        if after - before < rise:
            continue
        found.append(
            Refill(
                start_index=start,
                end_index=end,
                t_start=float(times[start]),
                t_end=float(times[end]),
                level_before_l=before,
                level_after_l=after,
            )
        )
        last_end = end
    return found


def _merge_close(refills: list[Refill], merge: float) -> list[Refill]:
    merged: list[Refill] = []
    for refill in refills:
        if merged and refill.t_start - merged[-1].t_end <= merge:
            prev = merged[-1]
            merged[-1] = Refill(
                start_index=prev.start_index,
                end_index=refill.end_index,
                t_start=prev.t_start,
                t_end=refill.t_end,
                level_before_l=prev.level_before_l,
                level_after_l=refill.level_after_l,
                logged=prev.logged or refill.logged,
            )
        else:
            merged.append(refill)
    return merged


def _merge_logged(
    times: np.ndarray,
    levels: np.ndarray,
    refills: list[Refill],
    logged: np.ndarray,
    merge: float,
) -> list[Refill]:
    if logged.size == 0:
        return refills
    n = times.size
    out = list(refills)
    for moment in np.sort(logged).tolist():
        if moment < times[0] - merge or moment > times[-1] + merge:
            continue
        match = next(
            (k for k, r in enumerate(out) if r.t_start - merge <= moment <= r.t_end + merge),
            None,
        )
        if match is not None:
            r = out[match]
            out[match] = Refill(
                r.start_index,
                r.end_index,
                r.t_start,
                r.t_end,
                r.level_before_l,
                r.level_after_l,
                logged=True,
            )
            continue
        start = int(np.clip(np.searchsorted(times, moment, side="right") - 1, 0, n - 1))
        end = min(start + 1, n - 1)
        out.append(
            Refill(
                start_index=start,
                end_index=end,
                t_start=float(times[start]),
                t_end=float(times[end]),
                level_before_l=float(np.median(levels[max(0, start - 4) : start + 1])),
                level_after_l=float(np.median(levels[end : end + 5])),
                logged=True,
            )
        )
    out.sort(key=lambda r: (r.start_index, r.end_index))
    # A logged refill inside a detected one's span adds nothing; keep the wider one.
    cleaned: list[Refill] = []
    for r in out:
        if cleaned and r.start_index <= cleaned[-1].end_index:
            prev = cleaned[-1]
            cleaned[-1] = Refill(
                prev.start_index,
                max(prev.end_index, r.end_index),
                prev.t_start,
                max(prev.t_end, r.t_end),
                prev.level_before_l,
                r.level_after_l if r.end_index > prev.end_index else prev.level_after_l,
                logged=prev.logged or r.logged,
            )
        else:
            cleaned.append(r)
    return cleaned


# --- rate fits ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Segment:
    """A straight-line fit of the level between two refills."""

    t_start: float
    t_end: float
    n: int
    rate_l_per_day: float  # positive = consumption
    rate_uncertainty_l_per_day: float  # ~1 sigma of the robust fit
    level_at_end_l: float  # fitted level at t_end
    intercept_l: float  # fitted level at t_start


_PAIRS = 1025  # slope pairs drawn per segment; odd, so the median is one of them
_PAIRS_LAST = 32_769  # for the last segment, whose rate the forecast uses
_RESIDUALS = 513  # readings per segment for the intercept and the noise estimate
_SEED = 20_240_607  # fixed: the same log always gives the same rates


def fit_segments(
    t: np.ndarray,
    level_l: np.ndarray,
    refills: Sequence[Refill],
    *,
    min_points: int = 20,
    settle_s: float = 3600.0,
) -> list[Segment]:
    """A robust straight line through each stretch of readings between refills.

    The slope is the Theil–Sen estimator (H. Theil 1950; P. K. Sen, JASA 63, 1379 (1968)): the
    median of the slopes between pairs of readings, which ignores up to 29 % of bad readings.
    All n(n−1)/2 pairs of a day of one-minute readings are 10⁶; a seeded random draw of
    ``_PAIRS`` pairs gives the same median to well within the noise, and all segments of a log
    are drawn and reduced in one numpy pass. The intercept is the median residual.

    The uncertainty is the asymptotic standard error of Theil–Sen under Gaussian noise: that
    of least squares, σ/√Σ(t−t̄)², divided by √(3/π), Theil–Sen's relative efficiency (Sen
    1968), with σ estimated robustly from the median absolute residual (× 1.4826), and in
    quadrature the error that drawing pairs adds (see :func:`_theil_sen_slopes`). It assumes
    independent readings; slow wander of the true rate is not in it.

    Readings within ``settle_s`` after a refill are left out (the bath bubbles and the level
    meter settles), and stretches with fewer than ``min_points`` readings are not fitted.
    """
    times, levels = _series(t, level_l)
    if isinstance(min_points, bool) or not isinstance(min_points, int | np.integer):
        raise ScienceInputError("min_points must be a whole number", argument="min_points")
    if min_points < 3:
        raise ScienceInputError(
            f"min_points must be at least 3, got {min_points}", argument="min_points"
        )
    settle = require_non_negative(settle_s, "settle_s")
    n = times.size
    bounds: list[tuple[int, int]] = []
    begin = 0
    for refill in sorted(refills, key=lambda r: r.start_index):
        if not 0 <= refill.start_index <= refill.end_index < n:
            raise ScienceInputError(
                f"refill indices {refill.start_index}..{refill.end_index} are outside the "
                f"{n} readings",
                argument="refills",
            )
        if refill.start_index > begin:
            bounds.append((begin, refill.start_index))
        settled = float(times[refill.end_index]) + settle
        begin = max(refill.end_index + 1, int(np.searchsorted(times, settled, side="left")))
    if begin < n:
        bounds.append((begin, n))
    bounds = [(a, b) for a, b in bounds if b - a >= min_points]
    if not bounds:
        return []
    starts = np.array([a for a, _ in bounds], dtype=np.int64)
    lengths = np.array([b - a for a, b in bounds], dtype=np.int64)
    slopes, drawing_errors = _theil_sen_slopes(times, levels, starts, lengths)
    intercepts, sigmas, spreads = _residual_stats(times, levels, starts, lengths, slopes)

    segments = []
    for k, (a, b) in enumerate(bounds):
        slope = float(slopes[k])
        spread = float(spreads[k])
        fit_sigma = (
            float(sigmas[k]) / math.sqrt(spread) * math.sqrt(math.pi / 3) if spread > 0 else 0.0
        )
        slope_sigma = math.hypot(fit_sigma, float(drawing_errors[k]))
        t0 = float(times[a])
        t_end = float(times[b - 1])
        intercept = float(intercepts[k])
        segments.append(
            Segment(
                t_start=t0,
                t_end=t_end,
                n=b - a,
                rate_l_per_day=-slope * SECONDS_PER_DAY,
                rate_uncertainty_l_per_day=slope_sigma * SECONDS_PER_DAY,
                level_at_end_l=intercept + slope * (t_end - t0),
                intercept_l=intercept,
            )
        )
    return segments


def _residual_stats(
    times: np.ndarray,
    levels: np.ndarray,
    starts: np.ndarray,
    lengths: np.ndarray,
    slopes: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per segment: the median residual (intercept at t_start), the robust noise sigma (1.4826 ×
    median absolute deviation) and Σ(t − t̄)², from up to ``_RESIDUALS`` evenly spread readings.
    """
    count = starts.size
    intercepts = np.empty(count)
    sigmas = np.empty(count)
    spreads = np.empty(count)
    long = lengths >= _RESIDUALS
    for k in np.flatnonzero(~long).tolist():
        a, m = int(starts[k]), int(lengths[k])
        rel = times[a : a + m] - times[a]
        residuals = levels[a : a + m] - slopes[k] * rel
        intercepts[k] = np.median(residuals)
        sigmas[k] = 1.4826 * np.median(np.abs(residuals - intercepts[k]))
        spreads[k] = float(np.var(rel)) * m
    rows = np.flatnonzero(long)
    if rows.size:
        # Evenly spread readings of each long segment, one row a segment, reduced together.
        steps = np.linspace(0.0, 1.0, _RESIDUALS)
        index = starts[rows][:, None] + (steps[None, :] * (lengths[rows][:, None] - 1)).astype(
            np.int64
        )
        rel = times[index] - times[starts[rows]][:, None]
        residuals = levels[index] - slopes[rows][:, None] * rel
        middle = np.median(residuals, axis=1)
        intercepts[rows] = middle
        sigmas[rows] = 1.4826 * np.median(np.abs(residuals - middle[:, None]), axis=1)
        spreads[rows] = np.var(rel, axis=1) * lengths[rows]
    return intercepts, sigmas, spreads


def _theil_sen_slopes(
    times: np.ndarray, levels: np.ndarray, starts: np.ndarray, lengths: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Median pair slope (L/s) of each segment [start, start + length), and the standard error
    that drawing pairs (instead of taking them all) adds to it (0 where all pairs are used).

    The last segment, the one a forecast rests on, gets ``_PAIRS_LAST`` pairs, the rest
    ``_PAIRS``: a random draw of m pairs carries an extra error of about the spread of the
    central pair slopes over √m, which at 1025 pairs is comparable to the fit's own error.
    """
    slopes = np.empty(starts.size)
    extra = np.zeros(starts.size)
    all_pairs = lengths * (lengths - 1) // 2 <= _PAIRS
    for k in np.flatnonzero(all_pairs).tolist():
        a, m = int(starts[k]), int(lengths[k])
        i, j = np.triu_indices(m, 1)
        slopes[k] = np.median((levels[a + j] - levels[a + i]) / (times[a + j] - times[a + i]))
    rng = np.random.default_rng(_SEED)
    drawn = np.flatnonzero(~all_pairs)
    last = starts.size - 1
    groups = [drawn[drawn != last], drawn[drawn == last]]
    for rows, pairs in zip(groups, (_PAIRS, _PAIRS_LAST), strict=True):
        if rows.size:
            slopes[rows], extra[rows] = _drawn_pair_medians(
                times, levels, starts[rows], lengths[rows], pairs, rng
            )
    return slopes, extra


def _drawn_pair_medians(
    times: np.ndarray,
    levels: np.ndarray,
    starts: np.ndarray,
    lengths: np.ndarray,
    pairs: int,
    rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray]:
    size = lengths[:, None]
    first = (rng.random((starts.size, pairs)) * size).astype(np.int64)
    # a second index different from the first: an offset of 1..size-1, wrapped round
    offset = 1 + (rng.random((starts.size, pairs)) * (size - 1)).astype(np.int64)
    second = (first + offset) % size
    base = starts[:, None]
    first += base
    second += base
    slope = (levels[second] - levels[first]) / (times[second] - times[first])
    # The median and the order statistics m/2 ± √m/2 around it, which bound a 68 % interval
    # of the sample median (the binomial count below the median has sd √m/2).
    middle = pairs // 2
    half = max(1, round(math.sqrt(pairs) / 2))
    ranks = [middle - half, middle, middle + half]
    ordered = np.partition(slope, ranks, axis=1)
    error = (ordered[:, ranks[2]] - ordered[:, ranks[0]]) / 2
    return ordered[:, middle], error


def rate_history(segments: Sequence[Segment]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The boil-off rate over time: (t_mid POSIX s, rate L/day, 1-sigma L/day) per segment."""
    mid = np.array([(s.t_start + s.t_end) / 2 for s in segments], dtype=float)
    rate = np.array([s.rate_l_per_day for s in segments], dtype=float)
    sigma = np.array([s.rate_uncertainty_l_per_day for s in segments], dtype=float)
    return mid, rate, sigma


@dataclass(frozen=True)
class Analysis:
    """Refills, fitted segments and the current state of one level log."""

    refills: list[Refill]
    segments: list[Segment]
    rate_l_per_day: float  # of the last fitted segment
    rate_uncertainty_l_per_day: float
    level_now_l: float
    t_now: float


def analyse(
    t: np.ndarray,
    level_l: np.ndarray,
    *,
    min_rise_l: float,
    logged_times: Sequence[float] = (),
    merge_window_s: float = 3600.0,
    min_points: int = 20,
) -> Analysis:
    """Refills, per-segment rates and the level now, from one cryostat's level log.

    The rate is that of the last fitted segment. The level now is the fitted level at the last
    reading when that reading belongs to the last segment (the fit averages the meter noise);
    otherwise (a refill in the last hour, or too few readings since) it is the median of the
    last five readings.
    """
    times, levels = _series(t, level_l)
    refills = detect_refills(
        times,
        levels,
        min_rise_l=min_rise_l,
        logged_times=logged_times,
        merge_window_s=merge_window_s,
    )
    segments = fit_segments(times, levels, refills, min_points=min_points)
    if not segments:
        raise ScienceInputError(
            f"no stretch between refills has {min_points} readings to fit a boil-off rate",
            argument="level_l",
        )
    last = segments[-1]
    t_now = float(times[-1])
    level_now = last.level_at_end_l if last.t_end == t_now else float(np.median(levels[-5:]))
    return Analysis(
        refills=refills,
        segments=segments,
        rate_l_per_day=last.rate_l_per_day,
        rate_uncertainty_l_per_day=last.rate_uncertainty_l_per_day,
        level_now_l=level_now,
        t_now=t_now,
    )


# --- lab calendar ---------------------------------------------------------------------------


@dataclass(frozen=True)
class LabCalendar:
    """When someone is in the lab to do a transfer: working days and hours, and holidays.

    A working slot is a start time day_start, day_start + step, ... before day_end (local wall
    clock) on a working day that is not a holiday.
    """

    tz: str = "Europe/Berlin"  # IANA name
    working_days: tuple[int, ...] = (0, 1, 2, 3, 4)  # Monday = 0
    day_start: time = time(8, 0)
    day_end: time = time(17, 0)
    holidays: frozenset[date] = frozenset()
    _zone: ZoneInfo = field(init=False, repr=False, compare=False, hash=False)

    def __post_init__(self) -> None:
        try:
            zone = ZoneInfo(self.tz)
        except (ZoneInfoNotFoundError, ValueError, TypeError):
            raise ScienceInputError(
                f"unknown time zone {self.tz!r} (an IANA name such as 'Europe/Berlin')",
                argument="tz",
            ) from None
        object.__setattr__(self, "_zone", zone)
        days = tuple(self.working_days)
        if not days or any(
            isinstance(d, bool) or not isinstance(d, int) or not 0 <= d <= 6 for d in days
        ):
            raise ScienceInputError(
                f"working_days must be weekday numbers 0 (Monday) to 6, got {days!r}",
                argument="working_days",
            )
        object.__setattr__(self, "working_days", days)
        if not isinstance(self.day_start, time) or not isinstance(self.day_end, time):
            raise ScienceInputError("day_start and day_end must be times", argument="day_start")
        if self.day_end <= self.day_start:
            raise ScienceInputError(
                f"day_end {self.day_end} must be after day_start {self.day_start}",
                argument="day_end",
            )
        holidays = frozenset(self.holidays)
        if any(not isinstance(h, date) or isinstance(h, datetime) for h in holidays):
            raise ScienceInputError("holidays must be dates", argument="holidays")
        object.__setattr__(self, "holidays", holidays)

    @property
    def zone(self) -> ZoneInfo:
        return self._zone

    def is_working_day(self, day: date) -> bool:
        return day.weekday() in self.working_days and day not in self.holidays

    def is_working(self, at: datetime) -> bool:
        """True if ``at`` falls within working hours of a working day."""
        local = _aware(at, "at").astimezone(self._zone)
        return self.is_working_day(local.date()) and self.day_start <= local.time() < self.day_end

    def _day_slots(self, day: date, step: timedelta) -> list[datetime]:
        if not self.is_working_day(day):
            return []
        # Wall-clock arithmetic within the day: an aware datetime plus a timedelta keeps its
        # zone, so 08:00 stays 08:00 on the day the clocks change.
        slot = datetime.combine(day, self.day_start, tzinfo=self._zone)
        end = datetime.combine(day, self.day_end, tzinfo=self._zone)
        out = []
        while slot < end:
            out.append(slot)
            slot = slot + step
        return out

    def _check_step(self, step: timedelta) -> timedelta:
        if not isinstance(step, timedelta) or step <= timedelta(0):
            raise ScienceInputError(
                f"step must be a positive timedelta, got {step!r}", argument="step"
            )
        return step

    def working_slots(
        self, after: datetime, until: datetime, step: timedelta = timedelta(hours=1)
    ) -> list[datetime]:
        """Working slots s with after <= s <= until, in order (in the calendar's zone)."""
        start = _aware(after, "after")
        stop = _aware(until, "until")
        self._check_step(step)
        out: list[datetime] = []
        day = start.astimezone(self._zone).date()
        last = stop.astimezone(self._zone).date()
        while day <= last:
            out.extend(s for s in self._day_slots(day, step) if start <= s <= stop)
            day += timedelta(days=1)
        return out

    def next_working_slot(self, after: datetime, step: timedelta = timedelta(hours=1)) -> datetime:
        """The first working slot strictly after ``after``."""
        start = _aware(after, "after")
        self._check_step(step)
        day = start.astimezone(self._zone).date()
        for _ in range(3 * 366):  # a calendar with no working day at all would loop for ever
            for slot in self._day_slots(day, step):
                if slot > start:
                    return slot
            day += timedelta(days=1)
        raise ScienceInputError(
            "the calendar has no working slot within 3 years", argument="holidays"
        )

    def previous_working_slot(
        self, before: datetime, step: timedelta = timedelta(hours=1)
    ) -> datetime:
        """The last working slot strictly before ``before``."""
        end = _aware(before, "before")
        self._check_step(step)
        day = end.astimezone(self._zone).date()
        for _ in range(3 * 366):
            for slot in reversed(self._day_slots(day, step)):
                if slot < end:
                    return slot
            day -= timedelta(days=1)
        raise ScienceInputError(
            "the calendar has no working slot within 3 years", argument="holidays"
        )

    def working_days_before(self, day: date, n: int) -> date:
        """The date ``n`` working days before ``day`` (``n`` = 0 gives ``day``)."""
        if isinstance(n, bool) or not isinstance(n, int) or n < 0:
            raise ScienceInputError(f"n must be a whole number >= 0, got {n!r}", argument="n")
        current = day
        counted = 0
        for _ in range(3 * 366 + 7 * n):
            if counted >= n:
                return current
            current -= timedelta(days=1)
            if self.is_working_day(current):
                counted += 1
        if counted >= n:
            return current
        raise ScienceInputError("the calendar has too few working days", argument="holidays")


# --- forecast -------------------------------------------------------------------------------


@dataclass(frozen=True)
class Forecast:
    """When a bath reaches its minimum and when to refill it."""

    level_now_l: float
    rate_l_per_day: float
    rate_uncertainty_l_per_day: float
    heat_load_w: float
    minimum_at: datetime | None  # None if the rate is <= 0
    minimum_at_earliest: datetime | None  # at rate + 2 sigma
    minimum_at_latest: datetime | None  # at rate - 2 sigma (None if that rate <= 0)
    latest_safe_refill_at: datetime | None  # minimum_at_earliest minus the margin
    recommended_refill_at: datetime | None
    warning: str | None


_FAR_DAYS = 36_500.0  # beyond a century a bath does not run dry in any plan worth showing


def _reach(now: datetime, level: float, minimum: float, rate: float) -> datetime | None:
    if rate <= 0:
        return None
    days = max(0.0, (level - minimum) / rate)
    if days > _FAR_DAYS:
        return None
    return now + timedelta(days=days)


def _recommend(
    calendar: LabCalendar, now: datetime, latest_safe: datetime
) -> tuple[datetime | None, str | None]:
    """The last working slot s >= now whose FOLLOWING working slot is still <= latest_safe.

    So if the refill at s is missed, the next chance in working hours still comes before the
    bath is within the margin of its minimum. When no slot has that spare one after it, the
    first slot before latest_safe is offered with a warning; when there is none, nothing is
    recommended (the refill has to happen outside working hours).
    """
    if latest_safe < now:
        return None, "the latest safe refill time has passed: refill now"
    try:
        last = calendar.previous_working_slot(latest_safe + timedelta(microseconds=1))
    except ScienceInputError:
        last = None
    if last is None or last < now:
        return None, (
            "minimum reached before the next working slot: arrange a refill outside working "
            f"hours before {latest_safe.isoformat()}"
        )
    try:
        penultimate = calendar.previous_working_slot(last)
    except ScienceInputError:
        penultimate = None
    if penultimate is None or penultimate < now:
        return last, "no spare working slot before the latest safe refill: refill at the first"
    return penultimate, None


def forecast(
    *,
    name: str,
    level_now_l: float,
    now: datetime,
    rate_l_per_day: float,
    rate_uncertainty_l_per_day: float,
    minimum_l: float,
    calendar: LabCalendar,
    margin_h: float = 12.0,
) -> Forecast:
    """When the bath reaches ``minimum_l`` at the fitted rate (and its 2-sigma band), the latest
    safe refill and the working slot to refill in.

    The planning side is the worst case, rate + 2 sigma: the latest safe refill is
    ``margin_h`` before the minimum at that rate, and the recommended refill is the last working
    slot whose following working slot is still no later than that. A bath that would run dry
    over a weekend is therefore refilled on Friday, never left for Monday.
    """
    props = cryogen(name)
    level = require_non_negative(level_now_l, "level_now_l")
    rate = require_finite(rate_l_per_day, "rate_l_per_day")
    sigma = require_non_negative(rate_uncertainty_l_per_day, "rate_uncertainty_l_per_day")
    minimum = require_non_negative(minimum_l, "minimum_l")
    margin = require_non_negative(margin_h, "margin_h")
    start = _aware(now, "now")
    if not isinstance(calendar, LabCalendar):
        raise ScienceInputError("calendar must be a LabCalendar", argument="calendar")

    worst = rate + 2 * sigma
    earliest = _reach(start, level, minimum, worst)
    latest_safe = earliest - timedelta(hours=margin) if earliest is not None else None
    recommended = None
    warning = None
    if level <= minimum:
        warning = "the level is at or below the minimum: refill now"
    if latest_safe is not None:
        recommended, note = _recommend(calendar, start, latest_safe)
        warning = warning or note
    return Forecast(
        level_now_l=level,
        rate_l_per_day=rate,
        rate_uncertainty_l_per_day=sigma,
        heat_load_w=float(heat_load_w(rate, props.name)),
        minimum_at=_reach(start, level, minimum, rate),
        minimum_at_earliest=earliest,
        minimum_at_latest=_reach(start, level, minimum, rate - 2 * sigma),
        latest_safe_refill_at=latest_safe,
        recommended_refill_at=recommended,
        warning=warning,
    )


# --- refill plans ---------------------------------------------------------------------------


@dataclass(frozen=True)
class CryostatPlanInput:
    """One bath to plan for."""

    key: str  # returned in PlannedRefill.cryostat
    name: str  # "LHe" / "LN2"
    capacity_l: float
    minimum_l: float
    level_now_l: float
    rate_l_per_day: float
    rate_uncertainty_l_per_day: float
    fill_to_l: float | None = None  # default capacity
    loss_fraction: float = 0.2  # transfer loss (common practice 10–30 % for LHe)
    line_cooldown_l: float = 1.0  # fixed litres to cool the transfer line
    price_per_l: float = 0.0
    lead_time_working_days: int = 5  # order helium >= 5 weekdays ahead (FIELD.md)


@dataclass(frozen=True)
class PlannedRefill:
    cryostat: str
    cryogen: str
    at: datetime
    level_before_l: float
    amount_l: float  # litres put into the bath
    order_l: float  # litres to order, losses included
    order_by: date
    cost: float
    out_of_hours: bool = False  # no working slot came in time: someone must come in


@dataclass(frozen=True)
class Plan:
    refills: list[PlannedRefill]
    total_order_l: dict[str, float]
    cost: float


def order_litres(amount_l: float, loss_fraction: float, line_cooldown_l: float) -> float:
    """Litres to take from the supply for ``amount_l`` litres in the bath.

    amount / (1 − loss_fraction) + line_cooldown_l: the loss is a fraction of what flows
    (flash gas, heat leak of the line), the cool-down of the line a fixed amount per transfer.
    """
    amount = require_non_negative(amount_l, "amount_l")
    loss = require_non_negative(loss_fraction, "loss_fraction")
    if loss >= 1:
        raise ScienceInputError(
            f"loss_fraction must be below 1, got {loss}", argument="loss_fraction"
        )
    cooldown = require_non_negative(line_cooldown_l, "line_cooldown_l")
    return amount / (1 - loss) + cooldown


def _check_plan_input(item: CryostatPlanInput) -> tuple[float, float, float, float]:
    if not isinstance(item, CryostatPlanInput):
        raise ScienceInputError("inputs must be CryostatPlanInput records", argument="inputs")
    label = f"cryostat {item.key}"
    cryogen(item.name)
    capacity = require_finite(item.capacity_l, "capacity_l")
    if capacity <= 0:
        raise ScienceInputError(
            f"{label}: capacity_l must be greater than zero, got {capacity}",
            argument="capacity_l",
        )
    minimum = require_non_negative(item.minimum_l, "minimum_l")
    level = require_non_negative(item.level_now_l, "level_now_l")
    fill_to = capacity if item.fill_to_l is None else require_positive(item.fill_to_l, "fill_to_l")
    if fill_to > capacity:
        raise ScienceInputError(
            f"{label}: fill_to_l {fill_to} is above capacity_l {capacity}", argument="fill_to_l"
        )
    if fill_to <= minimum:
        raise ScienceInputError(
            f"{label}: fill_to_l {fill_to} must be above minimum_l {minimum}",
            argument="minimum_l",
        )
    rate = require_finite(item.rate_l_per_day, "rate_l_per_day")
    sigma = require_non_negative(item.rate_uncertainty_l_per_day, "rate_uncertainty_l_per_day")
    require_non_negative(item.price_per_l, "price_per_l")
    order_litres(0.0, item.loss_fraction, item.line_cooldown_l)
    lead = item.lead_time_working_days
    if isinstance(lead, bool) or not isinstance(lead, int) or lead < 0:
        raise ScienceInputError(
            f"{label}: lead_time_working_days must be a whole number >= 0",
            argument="lead_time_working_days",
        )
    return min(level, capacity), fill_to, minimum, rate + 2 * sigma


_MIN_TOP_UP = 0.25  # of the usable volume: a smaller planned transfer is not worth a slot


def _simulate(
    item: CryostatPlanInput,
    *,
    now: datetime,
    until: datetime,
    calendar: LabCalendar,
    margin: timedelta,
    before: dict[date, datetime] | None = None,
) -> list[PlannedRefill]:
    """Refills of one bath at its worst-case rate from ``now`` to ``until``.

    ``before`` maps a local date to the earliest refill of another cryogen that day; this
    bath's refill that day is moved to a working slot before it (earlier is always safe).
    """
    level, fill_to, minimum, worst = _check_plan_input(item)
    if worst <= 0:
        return []
    hold = (fill_to - minimum) / worst  # days a full bath lasts to its minimum
    if hold * SECONDS_PER_DAY <= margin.total_seconds() + 3600.0:
        raise ScienceInputError(
            f"cryostat {item.key}: filled to {fill_to:g} L it reaches its minimum in "
            f"{hold * 24:.1f} h at the worst-case rate, within the {margin} margin; no plan "
            "can keep it above the minimum",
            argument="rate_l_per_day",
        )
    zone = calendar.zone
    planned: list[PlannedRefill] = []
    t, current = now, level
    first = True
    # Each refill comes at least an hour after the one before (checked above), so this bounds
    # the loop even for a bath that needs a refill every working slot.
    for _ in range(int((until - now).total_seconds() // 3600) + 2):
        earliest = _reach(t, current, minimum, worst)
        if earliest is None:
            break
        latest_safe = earliest - margin
        if latest_safe > until:
            break
        # After a refill the next one must come in a later slot, not the same one again.
        at, _note = _recommend(calendar, t if first else t + timedelta(microseconds=1), latest_safe)
        if at is not None:
            # A slot that would only top up a bath just filled (the last slot of a Friday right
            # after the one before it), or one still above fill_to, is no refill: the weekend
            # needs a transfer outside hours.
            gained = fill_to - current + worst * (at - t).total_seconds() / SECONDS_PER_DAY
            if gained < _MIN_TOP_UP * (fill_to - minimum):
                at = None
        if at is None:
            # No working slot in time: plan the transfer outside hours, at the latest safe
            # time (or at once if that has passed); the forecast carries the warning.
            at = max(t, latest_safe) if first else max(t + timedelta(hours=1), latest_safe)
        elif before:
            for _guard in range(7):
                rival = before.get(at.astimezone(zone).date())
                if rival is None or at < rival:
                    break
                earlier = calendar.previous_working_slot(rival)
                gained = fill_to - current + worst * (earlier - t).total_seconds() / SECONDS_PER_DAY
                # Earlier is always safe, but not if it leaves only a top-up: then the LN2
                # transfer stays after the helium that day.
                if earlier <= t or gained < _MIN_TOP_UP * (fill_to - minimum):
                    break
                at = earlier
        level_before = current - worst * (at - t).total_seconds() / SECONDS_PER_DAY
        amount = fill_to - level_before
        order = order_litres(amount, item.loss_fraction, item.line_cooldown_l)
        planned.append(
            PlannedRefill(
                cryostat=item.key,
                cryogen=item.name,
                at=at,
                level_before_l=level_before,
                amount_l=amount,
                order_l=order,
                order_by=calendar.working_days_before(
                    at.astimezone(zone).date(), item.lead_time_working_days
                ),
                cost=order * item.price_per_l,
                out_of_hours=not calendar.is_working(at),
            )
        )
        t, current, first = at, fill_to, False
    return planned


def plan_refills(
    inputs: Sequence[CryostatPlanInput],
    *,
    now: datetime,
    weeks: int,
    calendar: LabCalendar,
    margin_h: float = 12.0,
) -> Plan:
    """Every refill of every bath for the next ``weeks`` weeks, with what to order.

    Each bath is simulated at its worst-case rate (rate + 2 sigma) and refilled, to
    ``fill_to_l``, at the working slot :func:`forecast` would recommend. Where an LN2 shield
    and a helium bath fall due on one day, the LN2 transfer is put in an earlier slot (fill
    LN2 first, then LHe: FIELD.md). The invariant, tested by hypothesis: no simulated level
    falls below its minimum before ``now + weeks``.
    """
    start = _aware(now, "now")
    if isinstance(weeks, bool) or not isinstance(weeks, int) or weeks < 1:
        raise ScienceInputError(
            f"weeks must be a whole number >= 1, got {weeks!r}", argument="weeks"
        )
    if not isinstance(calendar, LabCalendar):
        raise ScienceInputError("calendar must be a LabCalendar", argument="calendar")
    margin = timedelta(hours=require_non_negative(margin_h, "margin_h"))
    items = list(inputs)
    keys = [item.key for item in items if isinstance(item, CryostatPlanInput)]
    if len(set(keys)) != len(keys):
        raise ScienceInputError("cryostat keys must be unique", argument="inputs")
    until = start + timedelta(weeks=weeks)
    zone = calendar.zone

    helium = [i for i in items if not isinstance(i, CryostatPlanInput) or i.name != "LN2"]
    nitrogen = [i for i in items if isinstance(i, CryostatPlanInput) and i.name == "LN2"]
    refills: list[PlannedRefill] = []
    for item in helium:
        refills.extend(_simulate(item, now=start, until=until, calendar=calendar, margin=margin))
    # LN2 goes in before the helium of that day's working hours; a helium transfer outside
    # hours is a visit of its own.
    first_helium: dict[date, datetime] = {}
    for r in refills:
        if r.out_of_hours:
            continue
        day = r.at.astimezone(zone).date()
        if day not in first_helium or r.at < first_helium[day]:
            first_helium[day] = r.at
    for item in nitrogen:
        refills.extend(
            _simulate(
                item,
                now=start,
                until=until,
                calendar=calendar,
                margin=margin,
                before=first_helium,
            )
        )
    refills.sort(key=lambda r: (r.at, r.cryogen != "LN2", r.cryostat))
    totals: dict[str, float] = {}
    for r in refills:
        totals[r.cryogen] = totals.get(r.cryogen, 0.0) + r.order_l
    return Plan(refills=refills, total_order_l=totals, cost=sum(r.cost for r in refills))


# --- safety and recovery --------------------------------------------------------------------


def worst_case_oxygen_percent(room_volume_m3: float, liquid_l: float, name: str) -> float:
    """Oxygen (% by volume) if ``liquid_l`` litres of cryogen evaporated at once in the room.

    20.9 × (V_room − V_gas)/V_room with V_gas = litres × expansion ratio at 15 °C: the gas
    is taken to push the same volume of air out of the room (REFERENCES.md §10). Never below 0.
    """
    props = cryogen(name)
    room = require_positive(room_volume_m3, "room_volume_m3")
    liquid = require_non_negative(liquid_l, "liquid_l")
    gas_m3 = liquid * props.expansion_ratio_15c / 1000.0
    return max(0.0, AIR_OXYGEN_PERCENT * (room - gas_m3) / room)


def recovered_liquid_equivalent_l(gas_m3_at_15c: float) -> float:
    """Litres of liquid helium whose boil-off is ``gas_m3_at_15c`` of returned gas (15 °C, 1 atm).

    637 L of gas per litre of liquid lost, not the expansion ratio 737 (REFERENCES.md §1).
    """
    gas = require_non_negative(gas_m3_at_15c, "gas_m3_at_15c")
    return gas * 1000.0 / CRYOGENS["LHe"].vented_gas_l_per_liquid_l_15c


def recovery_fraction(recovered_liquid_l: float, consumed_liquid_l: float) -> float:
    """Share of the consumed helium that came back through the recovery line."""
    recovered = require_non_negative(recovered_liquid_l, "recovered_liquid_l")
    consumed = require_positive(consumed_liquid_l, "consumed_liquid_l")
    return recovered / consumed


def rate_rise_alert(rates: np.ndarray, *, factor: float = 1.3, window: int = 5) -> bool:
    """True if the last rate exceeds ``factor`` × the median of the ``window`` rates before it.

    A degraded insulation vacuum shows as a rising boil-off; re-pump if it is up by more than
    30 % (FIELD.md). With no earlier rate, or a median that is not positive, there is nothing
    to compare with and the answer is False.
    """
    values = np.asarray(rates, dtype=float).ravel()
    if values.size == 0:
        raise ScienceInputError("rates is empty", argument="rates")
    if not np.isfinite(values).all():
        raise ScienceInputError("rates holds NaN or infinite values", argument="rates")
    ratio = require_positive(factor, "factor")
    if isinstance(window, bool) or not isinstance(window, int) or window < 1:
        raise ScienceInputError(
            f"window must be a whole number >= 1, got {window!r}", argument="window"
        )
    if values.size < 2:
        return False
    trailing = values[max(0, values.size - 1 - window) : -1]
    median = float(np.median(trailing))
    return median > 0 and float(values[-1]) > ratio * median
