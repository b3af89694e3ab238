"""Constants and quantity parsing, checked against scipy.constants and a fresh pint registry."""

import math

import pint
import pytest
import scipy.constants as sc
from hypothesis import given, settings
from hypothesis import strategies as st

from labbook.science import constants
from labbook.science.errors import QuantityError, ScienceInputError
from labbook.science.units import (
    convert,
    parse_field,
    parse_quantity,
    unit_for_field,
    ureg,
)

# An independent registry with pint's defaults only: the reference for conversions.
reference_ureg = pint.UnitRegistry()


def pint_reference(value, from_unit, to_unit):
    return reference_ureg.Quantity(value, from_unit).to(to_unit).magnitude


# --- constants -------------------------------------------------------------------------------


def test_defining_constants_equal_scipy():
    # scipy.constants (CODATA 2018: exact SI 2019 values)
    assert sc.e == constants.ELEMENTARY_CHARGE_C
    assert sc.k == constants.BOLTZMANN_J_PER_K
    assert sc.N_A == constants.AVOGADRO_PER_MOL


def test_pressure_units_equal_scipy():
    # scipy.constants: atm, torr, bar
    assert sc.atm == constants.ATM_PA
    assert pytest.approx(sc.torr, rel=1e-15) == constants.TORR_PA
    assert pytest.approx(sc.bar / 1000, rel=1e-15) == constants.MBAR_PA


def test_langmuir_in_si_units():
    # REFERENCES.md §2, Wikipedia 'Langmuir (unit)': 1 L = 1e-6 Torr·s = 1.333224e-4 Pa·s
    pa_s, mbar_s = constants.LANGMUIR_PA_S, constants.LANGMUIR_MBAR_S
    assert pa_s == pytest.approx(1e-6 * sc.torr, rel=1e-12)  # scipy.constants
    assert pa_s == pytest.approx(1.333224e-4, rel=1e-6)  # REFERENCES.md §2
    assert mbar_s == pytest.approx(1.333224e-6, rel=1e-6)  # REFERENCES.md §2


def test_langmuir_unit_in_registry_matches_pint_torr_second():
    # pint: 1e-6 Torr·s in Pa·s, with pint's own torr
    ours = ureg.Quantity(1, "langmuir").to("Pa*s").magnitude
    assert ours == pytest.approx(pint_reference(1e-6, "torr*s", "Pa*s"), rel=1e-12)
    # REFERENCES.md §2: 1e-6 mbar·s = 0.750062 L
    assert parse_quantity("1e-6 mbar*s", "langmuir", field="exposure_langmuir") == pytest.approx(
        0.750062, rel=1e-6
    )


def test_torr_and_mmhg_are_kept_apart():
    # REFERENCES.md §5 (pint keeps them apart; conventional mmHg = 133.322387415 Pa)
    assert parse_quantity("1 mmHg", "Pa", field="p") == pytest.approx(133.322387415, rel=1e-12)
    assert parse_quantity("1 Torr", "Pa", field="p") == pytest.approx(sc.torr, rel=1e-12)


# --- parse_quantity -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "unit", "source_value", "source_unit"),
    [
        ("2e-6 mbar", "mbar", 2e-6, "mbar"),
        ("2e-6 Torr", "mbar", 2e-6, "torr"),
        ("2.5e-6 torr", "Pa", 2.5e-6, "torr"),
        ("3 mTorr", "mbar", 3e-3, "torr"),
        ("15 min", "s", 15, "minute"),
        ("2 h", "s", 2, "hour"),
        ("5 uA", "A", 5, "microampere"),
        ("5 µA", "A", 5, "microampere"),
        ("200 nA", "A", 200, "nanoampere"),
        ("1 keV", "eV", 1, "keV"),
        ("773 K", "K", 773, "K"),
        ("1 cm^2", "m**2", 1, "cm**2"),
        ("0.25 cm²", "cm**2", 0.25, "cm**2"),
        ("6 MHz", "Hz", 6, "MHz"),
    ],
)
def test_parse_quantity_matches_pint(text, unit, source_value, source_unit):
    # pint (fresh default registry) as the reference conversion
    expected = pint_reference(source_value, source_unit, unit)
    assert parse_quantity(text, unit, field="f") == pytest.approx(expected, rel=1e-12)


def test_celsius_offset_is_applied():
    # pint: 500 °C = 773.15 K (offset conversion, not a factor)
    assert parse_quantity("500 degC", "K", field="temperature_k") == pytest.approx(773.15)
    assert parse_quantity("500 °C", "K", field="temperature_k") == pytest.approx(773.15)
    expected = reference_ureg.Quantity(500, "degC").to("K").magnitude
    assert parse_quantity("500 degC", "K", field="temperature_k") == pytest.approx(expected)
    assert parse_quantity("300 K", "degC", field="t") == pytest.approx(26.85)


def test_temperature_rate_in_celsius_per_minute_is_a_difference():
    # pint: a rate in °C/min is a temperature difference per time, 10 °C/min = 1/6 K/s
    assert parse_quantity("10 degC/min", "K/s", field="ramp_k_per_s") == pytest.approx(10 / 60)


def test_voltage_for_an_ion_energy_is_read_as_singly_charged():
    # E = e·U for a singly charged ion (definition of the electronvolt)
    assert parse_quantity("1.5 kV", "eV", field="energy_ev") == 1500.0
    assert parse_quantity("500 V", "keV", field="energy_kev") == pytest.approx(0.5)
    # the reverse is refused: a bias must never be typed as an energy
    with pytest.raises(QuantityError):
        parse_quantity("1 eV", "V", field="bias_v")


def test_plain_numbers_and_unitless_strings_are_in_the_field_unit():
    assert parse_quantity(2.5e-6, "mbar", field="pressure_mbar") == 2.5e-6
    assert parse_quantity(3, "s", field="duration_s") == 3.0
    assert parse_quantity("2.5e-6", "mbar", field="pressure_mbar") == 2.5e-6
    assert parse_quantity("  -0.5 ", "V", field="bias_v") == -0.5


def test_times_ten_notation():
    assert parse_quantity("2×10^-6 mbar", "mbar", field="p") == pytest.approx(2e-6, rel=1e-15)
    assert parse_quantity("2x10⁻⁶ mbar", "mbar", field="p") == pytest.approx(2e-6, rel=1e-15)
    assert parse_quantity("−3 V", "V", field="bias_v") == -3.0  # unicode minus


def test_pint_quantity_is_accepted_even_from_another_registry():
    # pint: quantities of another registry are rebuilt from their unit name
    q = reference_ureg.Quantity(2, "torr")
    assert parse_quantity(q, "mbar", field="p") == pytest.approx(2 * sc.torr / 100, rel=1e-12)
    assert parse_quantity(ureg.Quantity(5, "uA"), "A", field="i") == pytest.approx(5e-6)


def test_monolayer_unit_is_not_megalitre():
    # "ML" means monolayer here (pint's default would read it as megalitre)
    assert parse_quantity("0.3 ML", "monolayer", field="coverage_ml") == pytest.approx(0.3)
    assert parse_quantity("0.6 ML/h", "monolayer/minute", field="rate_ml_per_min") == (
        pytest.approx(0.01)
    )
    with pytest.raises(QuantityError):
        parse_quantity("0.3 ML", "liter", field="volume_l")


@pytest.mark.parametrize(
    "bad",
    ["2e-6 foo", "5 kg", "nan mbar", "inf mbar", "", "   ", "mbar", "1,5 mbar", "2 mbar)",
     "1e999 mbar", "3 10*mbar", "(", "e5", "3 x 100 mbar"],
)  # fmt: skip
def test_unreadable_or_incompatible_strings_raise_quantity_error(bad):
    with pytest.raises(QuantityError) as info:
        parse_quantity(bad, "mbar", field="pressure_mbar")
    error = info.value
    assert error.field == "pressure_mbar"
    assert error.argument == "pressure_mbar"
    assert "pressure_mbar" in str(error)
    assert isinstance(error, ScienceInputError)
    assert isinstance(error, ValueError)


def test_incompatible_unit_names_the_expected_unit():
    with pytest.raises(QuantityError) as info:
        parse_quantity("5 kg", "mbar", field="pressure_mbar")
    assert info.value.expected == "millibar"
    assert "mbar" in str(info.value)
    assert "kg" in str(info.value)


def test_decimal_comma_gets_its_own_message():
    with pytest.raises(QuantityError, match="decimal comma"):
        parse_quantity("2,5 mbar", "mbar", field="pressure_mbar")


@pytest.mark.parametrize("bad", [None, True, [1.0], float("nan"), float("inf"), {"v": 1}])
def test_non_numbers_raise_quantity_error(bad):
    with pytest.raises(QuantityError) as info:
        parse_quantity(bad, "s", field="duration_s")
    assert info.value.field == "duration_s"


def test_unknown_target_unit_raises():
    with pytest.raises(QuantityError, match="not a unit"):
        parse_quantity(1.0, "furlongs_per_blink", field="x")


# --- convert, field units ---------------------------------------------------------------------


def test_convert_torr_mbar_both_ways():
    # REFERENCES.md §5: 1 Torr = 1.333224 mbar, 1 mbar = 0.750062 Torr; scipy.constants.torr
    assert convert(1.0, "torr", "mbar") == pytest.approx(sc.torr / 100, rel=1e-12)
    assert convert(1.0, "torr", "mbar") == pytest.approx(1.333224, rel=1e-6)
    assert convert(1.0, "mbar", "Torr") == pytest.approx(0.750062, rel=1e-6)
    assert convert(1.0, "atm", "Pa") == sc.atm


def test_convert_temperature_and_refuses_voltage_to_energy():
    assert convert(500.0, "degC", "K") == pytest.approx(773.15)  # pint offset conversion
    with pytest.raises(QuantityError):
        convert(1.5, "kV", "eV")  # a plain conversion has no ion charge to assume
    with pytest.raises(QuantityError):
        convert(float("nan"), "mbar", "Pa")
    with pytest.raises(QuantityError):
        convert(1.0, "mbar", "s")


@pytest.mark.parametrize(
    ("field", "unit"),
    [
        ("pressure_mbar", "millibar"),
        ("energy_ev", "electron_volt"),
        ("current_a", "ampere"),
        ("duration_s", "second"),
        ("temperature_k", "kelvin"),
        ("beam_area_cm2", "centimeter ** 2"),
        ("rate_ml_per_min", "monolayer / minute"),
        ("coverage_ml", "monolayer"),
        ("exposure_langmuir", "langmuir"),
        ("fluence_per_cm2", "1 / centimeter ** 2"),
        ("ramp_k_per_s", "kelvin / second"),
        ("bias_v", "volt"),
        ("setpoint_a", "ampere"),
    ],
)
def test_unit_for_field(field, unit):
    assert unit_for_field(field) == unit
    assert ureg.parse_units(unit_for_field(field)) == ureg.parse_units(unit)


def test_parse_field_uses_the_suffix():
    assert parse_field("5 uA", "current_a") == pytest.approx(5e-6, rel=1e-12)
    assert parse_field("1 keV", "energy_ev") == pytest.approx(1000.0)
    assert parse_field("15 min", "duration_s") == 900.0
    with pytest.raises(QuantityError):
        parse_field("1", "notes")


# --- properties -----------------------------------------------------------------------------

_UNIT_PAIRS = [
    ("mbar", "Pa"),
    ("torr", "mbar"),
    ("uA", "A"),
    ("min", "s"),
    ("keV", "eV"),
    ("nm", "m"),
    ("degC", "K"),
]


@settings(max_examples=150, deadline=None)
@given(
    value=st.one_of(
        st.just(0.0),
        st.floats(min_value=1e-200, max_value=1e12),
        st.floats(min_value=-1e12, max_value=-1e-200),
    ),
    pair=st.sampled_from(_UNIT_PAIRS),
)
def test_property_string_parse_equals_pint_conversion(value, pair):
    source, target = pair
    expected = pint_reference(value, source, target)
    result = parse_quantity(f"{value!r} {source}", target, field="f")
    assert math.isfinite(result)
    assert result == pytest.approx(expected, rel=1e-12, abs=1e-300)


@settings(max_examples=300, deadline=None)
@given(text=st.text(max_size=24))
def test_property_any_text_gives_a_finite_float_or_a_quantity_error(text):
    try:
        result = parse_quantity(text, "mbar", field="pressure_mbar")
    except QuantityError as error:
        assert error.field == "pressure_mbar"
    else:
        assert math.isfinite(result)


@pytest.mark.parametrize(
    ("value", "unit"),
    [("2.1e-10 mbar", "mbar"), ("1e-8 Torr", "mbar"), ("1e-6 Pa", "mbar"), ("25 degC", "K"),
     ("-10 degC", "K"), ("300 K", "K"), (4.2, "K"), ("77", "K"), ("50 %", "%"), ("2 mL", "L")],
)
def test_parse_many_agrees_with_parse_quantity(value, unit):
    # parse_quantity is itself checked against pint above; the cached path must give the same.
    from labbook.science.units import parse_many

    assert parse_many(value, unit, field="value") == pytest.approx(
        parse_quantity(value, unit, field="value"), rel=1e-12
    )


def test_parse_many_reports_what_parse_quantity_reports():
    from labbook.science.units import parse_many

    for bad in ("3 mbar", "fast", float("nan"), "1e-8 parsec"):
        with pytest.raises(QuantityError) as cached:
            parse_many(bad, "K", field="value")
        with pytest.raises(QuantityError) as direct:
            parse_quantity(bad, "K", field="value")
        assert str(cached.value) == str(direct.value)
