"""Properties of labbook.science under generated input (hypothesis).

Valid input never raises and never answers NaN or infinity; invalid input raises
ScienceInputError with a message that names the problem, never another exception (a
TypeError or ZeroDivisionError from deep inside numpy would reach the API as a 500).
The exact values are checked against published sources in the other tests of this folder;
here the checks are the ones that hold for every input.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from labbook.science import deposition, images, spectra, thermometry, timeseries, units, vacuum
from labbook.science.errors import ScienceInputError

settings.register_profile(
    "labbook-properties",
    max_examples=60,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow],
)
PROFILE = settings.get_profile("labbook-properties")

positive = st.floats(min_value=1e-30, max_value=1e30, allow_nan=False, allow_infinity=False)
non_negative = st.floats(min_value=0.0, max_value=1e30, allow_nan=False, allow_infinity=False)
finite = st.floats(min_value=-1e30, max_value=1e30, allow_nan=False, allow_infinity=False)
not_finite = st.sampled_from([math.nan, math.inf, -math.inf])
negative = st.floats(max_value=-1e-300, min_value=-1e30, allow_nan=False)
junk_text = st.text(max_size=40)


def all_finite(value: Any) -> bool:
    """Every number in a result (nested dicts, lists, arrays, dataclasses) is finite."""
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return True
    if isinstance(value, int | float | np.floating | np.integer):
        return math.isfinite(float(value))
    if isinstance(value, np.ndarray):
        return value.dtype.kind not in "fc" or bool(np.all(np.isfinite(value)))
    if isinstance(value, dict):
        return all(all_finite(v) for v in value.values())
    if isinstance(value, list | tuple):
        return all(all_finite(v) for v in value)
    if hasattr(value, "__dataclass_fields__"):
        return all(all_finite(getattr(value, name)) for name in value.__dataclass_fields__)
    return True


def refused(call, *args, **kwargs) -> ScienceInputError:
    with pytest.raises(ScienceInputError) as caught:
        call(*args, **kwargs)
    assert str(caught.value).strip(), "the error has no message"
    return caught.value


def refused_or_finite(call, *args, **kwargs) -> None:
    """For input that may or may not be valid: a finite answer or a clear refusal."""
    try:
        result = call(*args, **kwargs)
    except ScienceInputError as exc:
        assert str(exc).strip()
        return
    assert all_finite(result), result


# --- units ---------------------------------------------------------------------------------


@PROFILE
@given(x=finite)
def test_a_number_in_the_field_unit_is_itself(x):
    assert units.parse_quantity(x, "mbar", field="pressure_mbar") == pytest.approx(x, rel=1e-12)


@PROFILE
@given(
    x=st.floats(min_value=-1e250, max_value=1e250, allow_nan=False),
    unit=st.sampled_from(["Pa", "mbar", "Torr", "bar", "hPa"]),
)
def test_pressure_strings_in_any_pressure_unit_convert_to_finite_mbar(x, unit):
    value = units.parse_quantity(f"{x!r} {unit}", "mbar", field="pressure_mbar")
    assert math.isfinite(value)


@PROFILE
@given(text=junk_text)
def test_any_text_is_a_finite_quantity_or_a_clear_error_naming_the_field(text):
    try:
        value = units.parse_quantity(text, "mbar", field="pressure_mbar")
    except ScienceInputError as exc:
        assert exc.argument == "pressure_mbar" and str(exc).strip()
        return
    assert math.isfinite(value)


@PROFILE
@given(bad=not_finite)
def test_nan_and_infinity_are_refused(bad):
    error = refused(units.parse_quantity, bad, "mbar", field="pressure_mbar")
    assert error.argument == "pressure_mbar"
    refused(units.parse_quantity, f"{bad} mbar", "mbar", field="pressure_mbar")


def test_an_incompatible_unit_is_refused_by_name():
    error = refused(units.parse_quantity, "5 K", "mbar", field="pressure_mbar")
    assert "pressure_mbar" in str(error) or error.argument == "pressure_mbar"


@PROFILE
@given(x=st.floats(min_value=-273.15, max_value=1e6, allow_nan=False))
def test_temperature_conversions_stay_finite(x):
    kelvin = units.convert(x, "degC", "K")
    assert math.isfinite(kelvin) and kelvin == pytest.approx(x + 273.15, rel=1e-9, abs=1e-9)


# --- vacuum ----------------------------------------------------------------------------------

# The gases of the ion-gauge sensitivity table (vacuum.py: CRC Handbook, Redhead).
GASES = ["N2", "Ar", "H2", "He", "O2", "CO", "CO2", "H2O", "Xe", "Kr", "Ne"]


@PROFILE
@given(p=positive, t=non_negative)
def test_exposure_is_finite_and_non_negative(p, t):
    assume(p * t < 1e300)
    value = vacuum.exposure_langmuir(p, t)
    assert math.isfinite(value) and value >= 0


@PROFILE
@given(p=st.one_of(negative, not_finite), t=non_negative)
def test_exposure_refuses_a_negative_or_non_finite_pressure(p, t):
    refused(vacuum.exposure_langmuir, p, t)


@PROFILE
@given(
    p=st.floats(min_value=1e-14, max_value=1e3),
    gas=st.sampled_from(GASES),
    temperature=st.floats(min_value=1.0, max_value=3000.0),
)
def test_impingement_and_true_pressure_are_finite_and_positive(p, gas, temperature):
    rate = vacuum.impingement_rate_per_cm2_s(p, gas, temperature)
    assert math.isfinite(rate) and rate > 0
    true = vacuum.true_pressure(p, gas)
    assert math.isfinite(true) and true > 0


@PROFILE
@given(p=st.floats(min_value=1e-20, max_value=1100.0))
def test_every_positive_pressure_up_to_atmospheric_has_a_vacuum_range(p):
    found = vacuum.vacuum_range(p)
    assert found.label


@PROFILE
@given(p=st.floats(min_value=1100.0, max_value=1e30, exclude_min=True))
def test_a_pressure_above_atmospheric_is_not_a_vacuum(p):
    assert "atmospheric" in str(refused(vacuum.vacuum_range, p))


@PROFILE
@given(p=st.one_of(st.floats(max_value=0.0, allow_nan=False), not_finite))
def test_a_pressure_of_zero_or_less_has_no_vacuum_range(p):
    refused(vacuum.vacuum_range, p)


@PROFILE
@given(text=junk_text)
def test_any_gas_name_is_known_or_clearly_unknown(text):
    refused_or_finite(vacuum.molar_mass_kg_per_mol, text)
    refused_or_finite(vacuum.formula_molar_mass_g_per_mol, text)
    refused_or_finite(vacuum.gas_correction_factor, text)


# --- deposition ------------------------------------------------------------------------------


@PROFILE
@given(rate=st.floats(min_value=0, max_value=1e6), duration=st.floats(min_value=0, max_value=1e9))
def test_coverage_is_finite_and_non_negative(rate, duration):
    value = deposition.coverage_ml(rate, duration)
    assert math.isfinite(value) and value >= 0


@PROFILE
@given(rate=st.one_of(negative, not_finite), duration=non_negative)
def test_coverage_refuses_a_negative_or_non_finite_rate(rate, duration):
    refused(deposition.coverage_ml, rate, duration)


@PROFILE
@given(
    shift=st.floats(min_value=-1e5, max_value=1e5, allow_nan=False),
    density=st.floats(min_value=0.1, max_value=25.0),
    f0=st.floats(min_value=1e6, max_value=1e7),
)
def test_qcm_thickness_is_finite_or_refused(shift, density, f0):
    refused_or_finite(deposition.qcm_thickness_angstrom, shift, density, f0)


@PROFILE
@given(
    points=st.lists(st.tuples(st.one_of(st.none(), finite), finite, finite), max_size=6),
    model=st.sampled_from(["constant", "proportional", "arrhenius", "cubic"]),
)
def test_any_calibration_points_fit_finitely_or_are_refused(points, model):
    try:
        fit = deposition.fit_rate_calibration(points, model)
    except ScienceInputError as exc:
        assert str(exc).strip()
        return
    assert all_finite(fit), fit


# --- thermometry -----------------------------------------------------------------------------


@st.composite
def type_and_temperature(draw):
    letter = draw(st.sampled_from(thermometry.THERMOCOUPLE_TYPES))
    low, high = thermometry.thermocouple_range_c(letter)
    if letter == "B":
        # Type B's emf has a minimum near 21 °C and is double-valued below about 42 °C
        # (NIST Monograph 175, from memory); the module inverts it from 50 °C up only.
        low = max(low, 50.0)
    return letter, draw(st.floats(min_value=low, max_value=high))


@PROFILE
@given(case=type_and_temperature())
def test_reference_emf_is_finite_and_inverts(case):
    letter, t_c = case
    emf = thermometry.reference_emf_mv(t_c, letter)
    assert math.isfinite(emf)
    back = thermometry.temperature_c_from_reference_emf(emf, letter)
    # NIST Monograph 175 (ITS-90 thermocouple tables): its inverse polynomials agree with the
    # reference functions to within about ±0.06 °C over their ranges (from memory); near the
    # ends of a range the emf is flat for some types, so 0.5 °C is the bound checked here.
    assert back == pytest.approx(t_c, abs=0.5)


@PROFILE
@given(letter=st.sampled_from(thermometry.THERMOCOUPLE_TYPES), beyond=st.floats(1.0, 1e6))
def test_a_temperature_outside_the_reference_range_is_refused(letter, beyond):
    low, high = thermometry.thermocouple_range_c(letter)
    error = refused(thermometry.reference_emf_mv, high + beyond, letter)
    assert "outside" in str(error)
    refused(thermometry.reference_emf_mv, low - beyond, letter)


@PROFILE
@given(letter=junk_text)
def test_an_unknown_thermocouple_type_is_refused(letter):
    assume(letter.strip().upper() not in thermometry.THERMOCOUPLE_TYPES)
    refused(thermometry.reference_emf_mv, 100.0, letter)


# --- images ----------------------------------------------------------------------------------

image_values = st.floats(min_value=-1e-6, max_value=1e-6, allow_nan=False)
images_2d = hnp.arrays(
    np.float64,
    hnp.array_shapes(min_dims=2, max_dims=2, min_side=2, max_side=24),
    elements=image_values,
)


@settings(PROFILE, max_examples=40)
@given(z=images_2d, periodicity=st.booleans())
def test_image_statistics_of_any_finite_image_are_finite(z, periodicity):
    stats = images.image_statistics(
        z, dx=1e-10, dy=1e-10, coverage_threshold=1e-10, periodicity=periodicity
    )
    assert all_finite(stats), stats
    assert stats["pixels"] == z.size


@settings(PROFILE, max_examples=30)
@given(z=images_2d, where=st.data())
def test_an_infinite_pixel_is_refused(z, where):
    z = z.copy()
    i = where.draw(st.integers(0, z.shape[0] - 1))
    j = where.draw(st.integers(0, z.shape[1] - 1))
    z[i, j] = np.inf
    refused(images.image_statistics, z, dx=1e-10, dy=1e-10)


@pytest.mark.parametrize(
    "bad",
    [np.zeros(5), np.zeros((1, 1)), np.full((4, 4), np.nan), np.zeros((2, 2, 2)), "z", None],
    ids=["1-d", "1x1", "all-nan", "3-d", "text", "none"],
)
def test_what_is_not_an_image_is_refused(bad):
    refused(images.image_statistics, bad, dx=1e-10, dy=1e-10)


@PROFILE
@given(dx=st.one_of(st.floats(max_value=0.0, allow_nan=False), not_finite))
def test_a_pixel_size_of_zero_or_less_is_refused(dx):
    refused(images.image_statistics, np.zeros((4, 4)), dx=dx, dy=1e-10)


# --- spectra ---------------------------------------------------------------------------------

spectrum_values = st.floats(min_value=-1e-6, max_value=1e-6, allow_nan=False)


@st.composite
def sweeps(draw):
    n = draw(st.integers(min_value=5, max_value=200))
    current = draw(hnp.arrays(np.float64, n, elements=spectrum_values))
    start = draw(st.floats(-2.0, 0.0))
    step = draw(st.floats(1e-4, 0.1))
    window = draw(st.sampled_from([w for w in (3, 5, 7, 11, 21) if w <= n]))
    order = draw(st.integers(0, min(window - 1, 4)))
    return start + step * np.arange(n), current, window, order


@PROFILE
@given(sweep=sweeps())
def test_smoothing_and_derivatives_of_any_finite_sweep_are_finite(sweep):
    bias, current, window, order = sweep
    assert all_finite(spectra.savgol_smooth(current, window=window, order=order))
    if order >= 1:
        didv = spectra.numerical_didv(bias, current, window=window, order=order)
        assert didv.shape == current.shape and all_finite(didv)


@PROFILE
@given(window=st.integers(-5, 40), order=st.integers(-3, 40), deriv=st.integers(-2, 6))
def test_filter_settings_are_valid_or_clearly_refused(window, order, deriv):
    y = np.linspace(0.0, 1.0, 64)
    try:
        out = spectra.savgol_derivative(y, dx=0.01, window=window, order=order, deriv=deriv)
    except ScienceInputError as exc:
        assert exc.argument in {"window", "order", "deriv", "y"} and str(exc).strip()
        return
    assert all_finite(out)


@PROFILE
@given(sweep=sweeps(), bad=not_finite)
def test_a_non_finite_current_is_refused(sweep, bad):
    bias, current, window, order = sweep
    current = current.copy()
    current[len(current) // 2] = bad
    refused(spectra.numerical_didv, bias, current, window=window, order=max(order, 1))


def test_bias_that_is_not_evenly_spaced_is_refused():
    bias = np.array([0.0, 0.1, 0.15, 0.4, 0.5, 0.6, 0.7])
    refused(spectra.numerical_didv, bias, np.zeros(7), window=5, order=2)


# --- time series -----------------------------------------------------------------------------


@st.composite
def series(draw):
    n = draw(st.integers(0, 300))
    steps = draw(hnp.arrays(np.float64, n, elements=st.floats(0.0, 1e4)))
    t = 1.7e9 + np.cumsum(steps)
    values = draw(
        hnp.arrays(np.float64, n, elements=st.floats(allow_nan=True, allow_infinity=True))
    )
    return t, values


@PROFILE
@given(data=series(), buckets=st.integers(1, 64))
def test_minmax_buckets_answer_finite_ordered_bands(data, buckets):
    t, values = data
    bt, low, high = timeseries.minmax_buckets(t, values, buckets)
    assert bt.shape == low.shape == high.shape
    assert len(bt) <= min(buckets, int(np.isfinite(values).sum()))
    assert all_finite((bt, low, high))
    assert np.all(low <= high) and np.all(np.diff(bt) >= 0)


@PROFILE
@given(buckets=st.one_of(st.integers(max_value=0), st.floats(), st.booleans(), st.text()))
def test_a_bucket_count_that_is_not_a_whole_positive_number_is_refused(buckets):
    refused(timeseries.minmax_buckets, [0.0, 1.0], [1.0, 2.0], buckets)


def test_time_out_of_order_is_refused():
    error = refused(timeseries.minmax_buckets, [2.0, 1.0], [1.0, 2.0], 4)
    assert error.argument == "t_seconds"


# --- found by these properties, reported (labbook/science is not this suite's to change) ------


def test_an_integer_beyond_float_range_is_a_clear_error():
    # JSON allows any integer literal; the API hands it to parse_quantity as a Python int.
    refused(units.parse_quantity, 10**400, "mbar", field="pressure_mbar")


def test_a_very_long_quantity_string_is_a_clear_error():
    refused(units.parse_quantity, "1 mbar" * 1000, "mbar", field="pressure_mbar")


@pytest.mark.parametrize(
    "call",
    [lambda: vacuum.exposure_langmuir(1e300, 1e300), lambda: deposition.coverage_ml(1e300, 1e300)],
    ids=["exposure", "coverage"],
)
def test_a_product_beyond_float_range_is_a_clear_error_not_infinity(call):
    try:
        value = call()
    except ScienceInputError:
        return
    assert math.isfinite(value), value
