"""Spectra: Savitzky–Golay smoothing and derivatives, numerical dI/dV, normalised conductance.

Conventions:

* ``bias_v`` is the sample bias in volts (sample with respect to tip, the usual STM
  convention): occupied sample states show at negative bias, so a state at E − E_F = −0.44 eV
  appears at −0.44 V. ``current_a`` in amperes, dI/dV in A/V (siemens).
* A spectrum is sampled on a uniform bias grid, as sweeps are; the spacing may be negative
  (a sweep from +1 V down to −1 V). A spacing that varies by more than 1 % is refused rather
  than resampled, since resampling would hide a problem in the file or the reader.
* Arrays of several spectra (a grid of shape (ny, nx, n), or forward and backward sweeps)
  are processed along their last axis.

Savitzky–Golay: the value (or derivative) at each point is that of the least-squares
polynomial of ``order`` through the ``window`` points centred on it (A. Savitzky and
M. J. E. Golay, Anal. Chem. 36, 1627 (1964)). At the ends, where no centred window fits,
the polynomial through the first (last) ``window`` points is evaluated at the end points:
the ``mode="interp"`` behaviour of ``scipy.signal.savgol_filter``, which the tests compare
against to 1e-10. Both the interior coefficients and the end matrices are cached, so a
2,000-point derivative costs two small matrix products and one correlation.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from labbook.science.errors import ScienceInputError, require_finite, require_positive

#: Largest relative deviation of a bias step from the mean step that is still "uniform".
UNIFORM_TOLERANCE = 0.01


# --- Savitzky–Golay -------------------------------------------------------------------------


def _check_filter(window: int, order: int, deriv: int) -> tuple[int, int, int]:
    for name, value in (("window", window), ("order", order), ("deriv", deriv)):
        if isinstance(value, bool) or not isinstance(value, int | np.integer):
            raise ScienceInputError(f"{name} must be an integer, got {value!r}", argument=name)
    window, order, deriv = int(window), int(order), int(deriv)
    if window < 1 or window % 2 == 0:
        raise ScienceInputError(
            f"window must be a positive odd number of points, got {window}", argument="window"
        )
    if not 0 <= order < window:
        raise ScienceInputError(
            f"order must be at least 0 and less than window ({window}), got {order}",
            argument="order",
        )
    if not 0 <= deriv <= order:
        raise ScienceInputError(
            f"deriv must be from 0 to order ({order}); a higher derivative of the fitted "
            f"polynomial is zero, got {deriv}",
            argument="deriv",
        )
    return window, order, deriv


def _readonly(array: np.ndarray) -> np.ndarray:
    array.setflags(write=False)  # cached: a caller must not be able to change it for others
    return array


def _fit_matrix(window: int, order: int) -> tuple[np.ndarray, float]:
    """pinv of the Vandermonde matrix of t = (k − h)/h, k = 0..window−1, h = window // 2.

    Scaling the positions to [−1, 1] keeps the matrix well conditioned for any window;
    returns the matrix and the scale h (1 for a one-point window)."""
    half = window // 2
    scale = float(max(half, 1))
    t = (np.arange(window, dtype=np.float64) - half) / scale
    vandermonde = t[:, None] ** np.arange(order + 1)
    return np.linalg.pinv(vandermonde), scale


def _derivative_rows(t: np.ndarray, order: int, deriv: int) -> np.ndarray:
    """Rows D with D @ p = d^deriv/dt^deriv of Σ p_k t^k at the positions t."""
    rows = np.zeros((t.size, order + 1))
    for k in range(deriv, order + 1):
        rows[:, k] = math.perm(k, deriv) * t ** (k - deriv)
    return rows


@lru_cache(maxsize=64)
def savgol_coefficients(window: int, order: int, deriv: int = 0) -> np.ndarray:
    """Savitzky–Golay weights c for the centre of a window, per unit sample spacing.

    The filtered value at point i is Σ_k c[k]·y[i − h + k] (h = window // 2), to be divided
    by Δx^deriv for a derivative with respect to x. Same numbers as
    ``scipy.signal.savgol_coeffs(window, order, deriv, use="dot")``. Cached and read-only.
    """
    window, order, deriv = _check_filter(window, order, deriv)
    pseudo_inverse, scale = _fit_matrix(window, order)
    rows = _derivative_rows(np.zeros(1), order, deriv)
    return _readonly((rows @ pseudo_inverse)[0] / scale**deriv)


@lru_cache(maxsize=64)
def _edge_matrices(window: int, order: int, deriv: int) -> tuple[np.ndarray, np.ndarray]:
    """(left, right): the h × window matrices giving the first and last h outputs from the
    first and last ``window`` points (per unit spacing), the polynomial through each end
    window evaluated at its end points."""
    pseudo_inverse, scale = _fit_matrix(window, order)
    half = window // 2
    left_t = (np.arange(half, dtype=np.float64) - half) / scale
    right_t = np.arange(1, half + 1, dtype=np.float64) / scale
    factor = scale**deriv
    left = _derivative_rows(left_t, order, deriv) @ pseudo_inverse / factor
    right = _derivative_rows(right_t, order, deriv) @ pseudo_inverse / factor
    return _readonly(left), _readonly(right)


def _as_spectra(y: object, name: str) -> np.ndarray:
    array = np.asarray(y)
    if array.dtype.kind not in "iuf":
        raise ScienceInputError(f"{name} must hold real numbers, got {array.dtype}", argument=name)
    if array.ndim < 1:
        raise ScienceInputError(f"{name} must be an array of samples, got a scalar", argument=name)
    array = array.astype(np.float64, copy=False)
    if not np.isfinite(array).all():
        raise ScienceInputError(
            f"{name} contains NaN or infinite values; spectra must be finite", argument=name
        )
    return array


def uniform_spacing(x: object, name: str = "x") -> float:
    """The mean step of a uniformly sampled, monotonic axis (may be negative).

    Raises ScienceInputError naming ``name`` if x is not 1-D with ≥ 2 finite points, is not
    strictly monotonic, or any step differs from the mean step by more than 1 %.
    """
    axis = _as_spectra(x, name)
    if axis.ndim != 1 or axis.size < 2:
        raise ScienceInputError(f"{name} must be 1-D with at least 2 points", argument=name)
    steps = np.diff(axis)
    step = (axis[-1] - axis[0]) / (axis.size - 1)
    if step == 0.0 or not (np.all(steps > 0) or np.all(steps < 0)):
        raise ScienceInputError(
            f"{name} must increase or decrease strictly from point to point", argument=name
        )
    deviation = float(np.max(np.abs(steps - step))) / abs(step)
    if deviation > UNIFORM_TOLERANCE:
        raise ScienceInputError(
            f"{name} is not uniformly spaced: a step differs from the mean step {step:.6g} by "
            f"{deviation:.1%} (more than {UNIFORM_TOLERANCE:.0%}); resample the spectrum onto "
            "a uniform grid first",
            argument=name,
        )
    return float(step)


def _savgol(y: np.ndarray, window: int, order: int, deriv: int, step: float) -> np.ndarray:
    n = y.shape[-1]
    if n < window:
        raise ScienceInputError(
            f"window ({window} points) is longer than the spectrum ({n} points)",
            argument="window",
        )
    coefficients = savgol_coefficients(window, order, deriv)
    left, right = _edge_matrices(window, order, deriv)
    half = window // 2
    out = np.empty_like(y)
    if y.ndim == 1:
        out[half : n - half] = np.correlate(y, coefficients, mode="valid")
    else:
        # Many spectra (a grid): one shifted multiply-add per weight over all of them, with
        # one temporary, rather than a window view times the weights, which matmul would
        # copy out to (points × window) values.
        middle = out[..., half : n - half]
        inner = n - window + 1
        np.multiply(y[..., :inner], coefficients[0], out=middle)
        term = np.empty_like(middle)
        for shift in range(1, window):
            np.multiply(y[..., shift : shift + inner], coefficients[shift], out=term)
            middle += term
    out[..., :half] = y[..., :window] @ left.T
    out[..., n - half :] = y[..., n - window :] @ right.T
    if deriv:
        out /= step**deriv
    return out


def _step(x: object, dx: float | None) -> float:
    if x is not None and dx is not None:
        raise ScienceInputError("give either x or dx, not both", argument="dx")
    if x is not None:
        return uniform_spacing(x, "x")
    if dx is None:
        return 1.0
    step = require_finite(dx, "dx")
    if step == 0.0:
        raise ScienceInputError("dx must not be zero", argument="dx")
    return step


def savgol_derivative(
    y: np.ndarray,
    x: np.ndarray | None = None,
    *,
    dx: float | None = None,
    window: int = 21,
    order: int = 3,
    deriv: int = 1,
) -> np.ndarray:
    """The ``deriv``-th derivative of ``y`` with respect to x by Savitzky–Golay filtering.

    Give the sample positions ``x`` (uniform within 1 %; the mean step is used) or the step
    ``dx`` (units of x per sample; neither: per sample). Units: y-units per x-unit^deriv.
    ``window`` odd, ``order`` < window, 1 ≤ ``deriv`` ≤ order. Exact for polynomials of
    degree ≤ ``order``. Equals ``scipy.signal.savgol_filter(y, window, order, deriv=deriv,
    delta=dx, mode="interp")``. ``y`` may hold several spectra along its last axis.
    """
    window, order, deriv = _check_filter(window, order, deriv)
    if deriv == 0:
        raise ScienceInputError(
            "deriv must be at least 1 here; use savgol_smooth for deriv = 0", argument="deriv"
        )
    values = _as_spectra(y, "y")
    step = _step(x, dx)
    if x is not None and np.shape(x)[-1] != values.shape[-1]:
        raise ScienceInputError(
            f"x has {np.shape(x)[-1]} points but y has {values.shape[-1]}", argument="x"
        )
    return _savgol(values, window, order, deriv, step)


def savgol_smooth(y: np.ndarray, *, window: int = 21, order: int = 3) -> np.ndarray:
    """``y`` smoothed by a Savitzky–Golay filter (``savgol_filter(..., mode="interp")``).

    Keeps polynomials of degree ≤ ``order`` unchanged, so peaks keep their height better
    than under a moving average of the same width. Along the last axis of ``y``.
    """
    window, order, _ = _check_filter(window, order, 0)
    return _savgol(_as_spectra(y, "y"), window, order, 0, 1.0)


# --- conductance ----------------------------------------------------------------------------


def _bias_and_current(bias_v: object, current_a: object) -> tuple[np.ndarray, np.ndarray]:
    bias = _as_spectra(bias_v, "bias_v")
    current = _as_spectra(current_a, "current_a")
    if bias.ndim != 1:
        raise ScienceInputError("bias_v must be 1-D", argument="bias_v")
    if current.shape[-1] != bias.size:
        raise ScienceInputError(
            f"current_a has {current.shape[-1]} points along its last axis but bias_v has "
            f"{bias.size}",
            argument="current_a",
        )
    return bias, current


def numerical_didv(
    bias_v: np.ndarray, current_a: np.ndarray, *, window: int = 21, order: int = 3
) -> np.ndarray:
    """dI/dV (A/V) of an I(V) sweep by a Savitzky–Golay derivative on the bias grid.

    A numerical derivative amplifies the current noise, the more the shorter the window; a
    lock-in dI/dV, where the file has one, is better. ``window`` and ``order`` as
    :func:`savgol_derivative`; the fit spans window·|ΔV| (21 points of 5 mV: 0.1 V), so keep
    it below the width of the features to be seen.
    """
    bias, current = _bias_and_current(bias_v, current_a)
    window, order, _ = _check_filter(window, order, 1)
    return _savgol(current, window, order, 1, uniform_spacing(bias, "bias_v"))


def mean_didv_weights(bias_v: np.ndarray, *, window: int = 21, order: int = 3) -> np.ndarray:
    """Weights w (1/V) with ``current @ w`` = the mean over bias of :func:`numerical_didv`.

    The Savitzky–Golay derivative is linear, D·I, so its mean is (1ᵀD/n)·I: w = Dᵀ1/n, built
    here in O(n·window) from the interior weights and the end matrices, never the n × n D.
    A grid's bias-averaged conductance map is then one matrix–vector product, with no
    derivative array as large as the grid; a spectrum with a NaN gives a NaN there.
    """
    bias = _as_spectra(bias_v, "bias_v")
    if bias.ndim != 1:
        raise ScienceInputError("bias_v must be 1-D", argument="bias_v")
    window, order, _ = _check_filter(window, order, 1)
    n = bias.size
    if n < window:
        raise ScienceInputError(
            f"window ({window} points) is longer than the spectrum ({n} points)",
            argument="window",
        )
    step = uniform_spacing(bias, "bias_v")
    coefficients = savgol_coefficients(window, order, 1)
    left, right = _edge_matrices(window, order, 1)
    inner = n - window + 1
    weights = np.zeros(n)
    # Output i (interior) is Σ_k c_k·I[i − h + k]: each weight c_k lands on the inputs
    # k … k + inner − 1, once per interior output.
    for k in range(window):
        weights[k : k + inner] += coefficients[k]
    weights[:window] += left.sum(axis=0)
    weights[n - window :] += right.sum(axis=0)
    return weights / (n * step)


def _exponential_sums(position: np.ndarray, values: np.ndarray) -> np.ndarray:
    """S_i = Σ_j values_j · exp(−|position_i − position_j|) for ascending positions, in O(n).

    Split as the sum over j ≤ i plus the sum over j ≥ i minus the j = i term. Each one-sided
    sum is a cumulative sum of values_j·exp(position_j − p₀) divided by exp(position_i − p₀),
    done in runs over which the exponent stays below 30 (no overflow, and the rounding stays
    at ~n·eps of the largest term), carried from run to run by the decay factor. The dense
    n×n kernel would need 32 MB and 4 million exponentials for a 2,000-point spectrum.
    """

    def one_sided(p: np.ndarray, f: np.ndarray) -> np.ndarray:
        out = np.empty_like(f)
        carry = 0.0
        last = p[0]
        start = 0
        n = p.size
        while start < n:
            stop = int(np.searchsorted(p, p[start] + 30.0, side="right"))
            stop = max(stop, start + 1)
            offset = p[start:stop] - p[start]
            growth = np.exp(offset)
            run = np.cumsum(f[start:stop] * growth) / growth
            run += carry * np.exp(-(p[start:stop] - last))
            out[start:stop] = run
            carry, last, start = float(run[-1]), float(p[stop - 1]), stop
        return out

    forward = one_sided(position, values)
    backward = one_sided(-position[::-1], values[::-1])[::-1]
    return forward + backward - values


def broadened_iv(bias_v: np.ndarray, current_a: np.ndarray, *, epsilon: float) -> np.ndarray:
    """I/V broadened by an exponential kernel of width ``epsilon`` (V), after Feenstra:

        (I/V)‾(V) = ∫ I(V′)/V′ · exp(−|V′ − V|/ε) dV′ / ∫ exp(−|V′ − V|/ε) dV′,

    the integrals running over the measured bias range (trapezoidal weights). The normaliser
    makes the broadening leave a constant I/V unchanged (an ohmic junction stays ohmic);
    over an infinite range it is 2ε. At V = 0 exactly, I/V (0/0) is interpolated from the
    neighbouring points. Source: R. M. Feenstra, Phys. Rev. B 50, 4561 (1994), which
    introduced broadening I/V this way to keep (dI/dV)/(I/V) finite in a band gap, with ε
    about the size of the gap — the formula and that advice are from memory, not checked
    against the paper.
    """
    bias, current = _bias_and_current(bias_v, current_a)
    width = require_positive(epsilon, "epsilon")
    if current.ndim != 1:
        raise ScienceInputError("current_a must be 1-D here", argument="current_a")
    uniform_spacing(bias, "bias_v")  # a monotonic sweep; its direction does not matter
    order = np.argsort(bias)
    v, i = bias[order], current[order]
    ratio = np.empty_like(v)
    zero = np.abs(v) <= 1e-12 * np.max(np.abs(v))
    ratio[~zero] = i[~zero] / v[~zero]
    if zero.any():
        ratio[zero] = np.interp(v[zero], v[~zero], ratio[~zero])
    weights = np.empty_like(v)  # trapezoidal rule on the (uniform or not) grid
    weights[1:-1] = 0.5 * (v[2:] - v[:-2])
    weights[0] = 0.5 * (v[1] - v[0])
    weights[-1] = 0.5 * (v[-1] - v[-2])
    position = v / width
    broadened = _exponential_sums(position, ratio * weights) / _exponential_sums(position, weights)
    out = np.empty_like(broadened)
    out[order] = broadened
    return out


def normalised_conductance(
    bias_v: np.ndarray, current_a: np.ndarray, didv: np.ndarray, *, epsilon: float
) -> np.ndarray:
    """(dI/dV)/(I/V)‾, the normalised conductance, with I/V broadened over ``epsilon`` (V).

    Plain (dI/dV)/(I/V) approximates the sample's density of states divided out of the
    tunnelling transmission, but diverges where I and V both go to zero (at V = 0 and across
    a gap). The broadening of :func:`broadened_iv` (Feenstra 1994; see there) keeps it finite.
    For a metal, ε of a few tens of mV changes little away from V = 0; for a semiconductor use
    about the gap. Dimensionless; 1 everywhere for an ohmic junction. Where the broadened I/V
    is exactly zero (no current anywhere near) the result is NaN.
    """
    bias, current = _bias_and_current(bias_v, current_a)
    conductance = _as_spectra(didv, "didv")
    if conductance.shape != current.shape:
        raise ScienceInputError(
            f"didv has shape {conductance.shape}, current_a {current.shape}", argument="didv"
        )
    if not np.any(current):
        raise ScienceInputError("current_a is zero everywhere", argument="current_a")
    reference = broadened_iv(bias, current, epsilon=epsilon)
    with np.errstate(divide="ignore", invalid="ignore"):
        result = conductance / reference
    result[reference == 0.0] = np.nan
    return result


def onset_energy(
    bias_v: np.ndarray,
    didv: np.ndarray,
    fraction: float = 0.5,
    *,
    levels: tuple[float, float] = (5.0, 95.0),
) -> float:
    """The bias (V) where dI/dV first rises to ``fraction`` of its step, scanning upwards.

    The step runs from the low level to the high level of dI/dV, taken as its ``levels``
    percentiles (robust to noise spikes, unlike min and max). The threshold is
    low + fraction·(high − low); the answer is the first crossing from below, going from the
    most negative bias up, interpolated linearly between the two samples around it. Meant for
    a step-like onset such as a Shockley surface-state band bottom (occupied, so at negative
    sample bias); smooth or average a noisy dI/dV first, or noise may cross early.
    """
    bias, conductance = _bias_and_current(bias_v, didv)
    if conductance.ndim != 1:
        raise ScienceInputError("didv must be 1-D", argument="didv")
    share = require_finite(fraction, "fraction")
    if not 0.0 < share < 1.0:
        raise ScienceInputError(
            f"fraction must be between 0 and 1, got {share}", argument="fraction"
        )
    low_percent, high_percent = (require_finite(level, "levels") for level in levels)
    if not 0.0 <= low_percent < high_percent <= 100.0:
        raise ScienceInputError(
            f"levels must satisfy 0 ≤ low < high ≤ 100, got {levels!r}", argument="levels"
        )
    order = np.argsort(bias, kind="stable")
    v, g = bias[order], conductance[order]
    low, high = np.percentile(g, [low_percent, high_percent])
    if not high > low:
        raise ScienceInputError("didv has no step (it is flat)", argument="didv")
    threshold = low + share * (high - low)
    above = np.flatnonzero(g >= threshold)
    first = int(above[0])
    if first == 0:
        # Already above at the lowest bias: find the first crossing after a dip below it.
        below = np.flatnonzero(g < threshold)
        later = above[above > below[0]] if below.size else above[:0]
        if later.size == 0:
            raise ScienceInputError(
                "didv never rises through the threshold from below", argument="didv"
            )
        first = int(later[0])
    v0, v1, g0, g1 = v[first - 1], v[first], g[first - 1], g[first]
    return float(v0 + (threshold - g0) * (v1 - v0) / (g1 - g0))
