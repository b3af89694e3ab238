"""Spectra: Savitzky–Golay smoothing and derivatives, dI/dV, normalised conductance, onsets."""

import math

import numpy as np
import pytest
from scipy.signal import savgol_coeffs, savgol_filter  # scipy: the outside reference (tests only)

from labbook.science import spectra
from labbook.science.errors import ScienceInputError

RNG = np.random.default_rng(11)


# --- Savitzky–Golay against scipy ------------------------------------------------------------


@pytest.mark.parametrize(
    ("window", "order", "deriv"),
    [(21, 3, 1), (21, 3, 0), (5, 2, 1), (7, 4, 2), (11, 2, 2), (3, 1, 1), (31, 5, 3), (1, 0, 0)],
)
def test_matches_scipy_savgol_filter_including_the_edges(window, order, deriv):
    # reference: scipy.signal.savgol_filter(..., mode="interp"), edges fitted by polynomials
    y = np.cumsum(RNG.standard_normal(500)) * 0.1  # a wandering O(1) signal
    step = 0.01
    expected = savgol_filter(y, window, order, deriv=deriv, delta=step, mode="interp")
    if deriv == 0:
        got = spectra.savgol_smooth(y, window=window, order=order)
    else:
        got = spectra.savgol_derivative(y, dx=step, window=window, order=order, deriv=deriv)
    assert np.max(np.abs(got - expected)) <= 1e-10 * max(1.0, np.max(np.abs(expected)))
    coefficients = spectra.savgol_coefficients(window, order, deriv)
    assert coefficients == pytest.approx(savgol_coeffs(window, order, deriv, use="dot"), abs=1e-13)


def test_descending_sweep_and_positions_match_scipy():
    # a sweep from +1 V to −1 V: negative step; scipy with delta < 0 is the reference
    bias = np.linspace(1.0, -1.0, 801)
    current = np.sinh(2.5 * bias) * 1e-9 + RNG.normal(0, 1e-12, bias.size)
    expected = savgol_filter(current, 21, 3, deriv=1, delta=bias[1] - bias[0], mode="interp")
    got = spectra.savgol_derivative(current, bias)
    assert np.max(np.abs(got - expected)) <= 1e-10 * np.max(np.abs(expected))
    assert spectra.numerical_didv(bias, current) == pytest.approx(got, rel=1e-12)


def test_several_spectra_along_the_last_axis_match_scipy():
    grid = RNG.standard_normal((3, 4, 120))  # a small dI/dV grid: ny × nx × bias points
    expected = savgol_filter(grid, 15, 3, deriv=1, delta=0.02, mode="interp", axis=-1)
    got = spectra.savgol_derivative(grid, dx=0.02, window=15)
    assert np.max(np.abs(got - expected)) <= 1e-10 * np.max(np.abs(expected))


def test_coefficients_are_cached_and_read_only():
    first = spectra.savgol_coefficients(21, 3, 1)
    assert spectra.savgol_coefficients(21, 3, 1) is first
    with pytest.raises(ValueError):
        first[0] = 1.0


# --- Savitzky–Golay on analytic functions ----------------------------------------------------


@pytest.mark.parametrize("order", [2, 3, 4])
def test_polynomials_up_to_the_order_are_differentiated_exactly(order):
    # the least-squares polynomial of a polynomial of degree ≤ order is itself, everywhere
    x = np.linspace(-1.0, 2.0, 301)
    coefficients = RNG.normal(size=order + 1)
    y = np.polyval(coefficients, x)
    exact = np.polyval(np.polyder(coefficients), x)
    got = spectra.savgol_derivative(y, x, window=21, order=order)
    assert np.max(np.abs(got - exact)) < 1e-9
    second = spectra.savgol_derivative(y, x, window=21, order=order, deriv=2)
    assert np.max(np.abs(second - np.polyval(np.polyder(coefficients, 2), x))) < 1e-6
    assert spectra.savgol_smooth(y, window=21, order=order) == pytest.approx(y, abs=1e-12)


def test_derivative_of_sine():
    # d/dx sin x = cos x; a cubic over ±0.1 rad misses by ~(0.1)⁴/4! relative inside, more
    # at the ends where the window is off-centre
    x = np.linspace(0.0, 2 * math.pi, 629)  # dx = 0.01
    got = spectra.savgol_derivative(np.sin(x), x, window=21, order=3)
    assert np.max(np.abs(got[10:-10] - np.cos(x[10:-10]))) < 2e-5
    assert np.max(np.abs(got - np.cos(x))) < 2e-3


# --- spacing and input checks -----------------------------------------------------------------


def test_small_jitter_is_accepted_and_uneven_spacing_refused():
    x = np.arange(200) * 0.005
    jitter = x + RNG.uniform(-0.4, 0.4, x.size) * 0.005 * 0.01  # ±0.4 % of a step
    assert spectra.uniform_spacing(jitter) == pytest.approx(0.005, rel=1e-3)
    uneven = x.copy()
    uneven[100:] += 0.0002  # one step 4 % longer
    with pytest.raises(ScienceInputError, match="not uniformly spaced") as error:
        spectra.savgol_derivative(np.sin(uneven), uneven)
    assert error.value.argument == "x"
    with pytest.raises(ScienceInputError, match="strictly") as error:
        spectra.uniform_spacing(np.array([0.0, 1.0, 1.0, 2.0]))
    assert error.value.argument == "x"


@pytest.mark.parametrize(
    ("kwargs", "argument"),
    [
        ({"window": 20}, "window"),  # even
        ({"window": 401}, "window"),  # longer than the spectrum
        ({"order": 21}, "order"),
        ({"deriv": 4}, "deriv"),
        ({"deriv": 0}, "deriv"),
        ({"dx": 0.0}, "dx"),
    ],
)
def test_bad_filter_arguments_name_themselves(kwargs, argument):
    with pytest.raises(ScienceInputError) as error:
        spectra.savgol_derivative(np.zeros(100), **kwargs)
    assert error.value.argument == argument


def test_non_finite_spectra_are_refused():
    y = np.ones(50)
    y[3] = np.nan
    with pytest.raises(ScienceInputError) as error:
        spectra.savgol_smooth(y)
    assert error.value.argument == "y"
    with pytest.raises(ScienceInputError) as error:
        spectra.numerical_didv(np.linspace(0, 1, 50), y)
    assert error.value.argument == "current_a"


# --- conductance ------------------------------------------------------------------------------


@pytest.mark.parametrize("points", [401, 400])  # with and without a sample at V = 0
def test_ohmic_junction_has_normalised_conductance_one(points):
    # I = V/R: dI/dV = I/V = 1/R, so (dI/dV)/(I/V) = 1 at every bias, broadened or not
    bias = np.linspace(-1.0, 1.0, points)
    current = bias / 10e6  # 10 MΩ, i.e. 100 pA at 1 V
    didv = spectra.numerical_didv(bias, current)
    assert didv == pytest.approx(np.full(points, 1e-7), rel=1e-9)
    for epsilon in (1e-4, 0.05, 1.0):
        result = spectra.normalised_conductance(bias, current, didv, epsilon=epsilon)
        assert np.max(np.abs(result - 1.0)) < 1e-9


def test_broadening_equals_the_direct_integral():
    # the O(n) exponential sums against the plain n×n quadrature of the same formula
    bias = np.linspace(-1.2, 0.9, 350)  # no sample at V = 0, where I/V is 0/0
    current = 1e-9 * np.sinh(3 * bias) + 2e-11 * bias**3
    weights = np.gradient(bias)
    weights[[0, -1]] /= 2  # trapezoidal weights on a uniform grid: half at the ends
    for epsilon in (0.001, 0.03, 0.3, 5.0):
        kernel = np.exp(-np.abs(bias[:, None] - bias[None, :]) / epsilon)
        expected = kernel @ (current / bias * weights) / (kernel @ weights)
        got = spectra.broadened_iv(bias, current, epsilon=epsilon)
        assert got == pytest.approx(expected, rel=1e-12)


def test_broadening_keeps_a_gapped_spectrum_finite():
    # a semiconductor-like I(V): no current inside a 1 V gap. Plain (dI/dV)/(I/V) is 0/0
    # there; with I/V broadened over about the gap (Feenstra 1994) it stays finite
    bias = np.linspace(-2.0, 2.0, 801)
    current = 1e-10 * np.sign(bias) * np.clip(np.abs(bias) - 0.5, 0, None) ** 2
    didv = spectra.numerical_didv(bias, current, window=11)
    with np.errstate(divide="ignore", invalid="ignore"):
        plain = didv / (current / bias)
    assert np.isnan(plain).any()
    result = spectra.normalised_conductance(bias, current, didv, epsilon=1.0)
    assert np.isfinite(result).all()
    inside = np.abs(bias) < 0.4
    assert np.max(np.abs(result[inside])) < 1e-3  # ~0 in the gap
    assert result[np.abs(bias) > 1.5].min() > 1.0  # rises above 1 outside it


def test_conductance_input_checks():
    bias = np.linspace(-1, 1, 50)
    with pytest.raises(ScienceInputError) as error:
        spectra.normalised_conductance(bias, np.zeros(50), np.zeros(50), epsilon=0.1)
    assert error.value.argument == "current_a"
    with pytest.raises(ScienceInputError) as error:
        spectra.normalised_conductance(bias, bias, np.ones(50), epsilon=0.0)
    assert error.value.argument == "epsilon"
    with pytest.raises(ScienceInputError) as error:
        spectra.normalised_conductance(bias, bias, np.ones(49), epsilon=0.1)
    assert error.value.argument == "didv"


# --- onset ------------------------------------------------------------------------------------


def surface_state_step(bias, onset=-0.44, width=0.008):
    """A Cu(111)-like Shockley surface-state dI/dV: a broadened step at the band bottom and
    a slow decrease above it. The −0.44 V location is only the synthetic position (the
    literature's ≈ −0.44 to −0.45 V onset, REFERENCES.md §8, from memory)."""
    step = 0.5 * (1.0 + np.tanh((bias - onset) / width))
    return 0.2 + step * (1.0 - 0.3 * (bias - onset))


def test_onset_of_a_smoothed_step_within_one_bias_step():
    bias = np.arange(-0.8, 0.3, 0.005)  # 5 mV steps
    result = spectra.onset_energy(bias, surface_state_step(bias))
    assert abs(result - (-0.44)) < 0.005


def test_onset_in_noisy_descending_sweep_after_smoothing():
    bias = np.arange(0.3, -0.8, -0.002)  # a sweep downwards, 2 mV steps
    didv = surface_state_step(bias) + RNG.normal(0.0, 0.02, bias.size)
    smooth = spectra.savgol_smooth(didv, window=11, order=2)
    assert abs(spectra.onset_energy(bias, smooth) - (-0.44)) < 0.005


def test_onset_needs_a_step():
    bias = np.linspace(-1, 1, 100)
    with pytest.raises(ScienceInputError) as error:
        spectra.onset_energy(bias, np.ones(100))
    assert error.value.argument == "didv"
    with pytest.raises(ScienceInputError) as error:
        spectra.onset_energy(bias, bias, fraction=1.5)
    assert error.value.argument == "fraction"
