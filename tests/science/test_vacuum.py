"""Vacuum: gauge correction, exposure, Hertz–Knudsen impingement, molar masses, ranges."""

import math

import pytest
import scipy.constants as sc
from CoolProp.CoolProp import PropsSI
from hypothesis import given, settings
from hypothesis import strategies as st

from labbook.science import vacuum
from labbook.science.errors import OutOfRangeError, ScienceInputError, UnknownNameError
from labbook.science.surfaces import monolayer_density_per_cm2
from tests.science.published import printed

TORR_IN_MBAR = sc.torr / 100  # scipy.constants


def hertz_knudsen_scipy(pressure_pa, molar_mass_g_per_mol, temperature_k):
    """Z = p / sqrt(2π m k T) in cm⁻² s⁻¹, recomputed with scipy.constants."""
    m = molar_mass_g_per_mol * 1e-3 / sc.N_A
    return pressure_pa / math.sqrt(2 * math.pi * m * sc.k * temperature_k) / 1e4


# --- ion-gauge sensitivities ----------------------------------------------------------------


def test_default_table_is_the_crc_redhead_column():
    # REFERENCES.md §3, CRC Handbook, Redhead (Bayard–Alpert, mean of 12 experimenters, ±15 %)
    expected = {
        "He": 0.18, "Ne": 0.31, "Ar": 1.4, "Kr": 1.9, "Xe": 2.7, "H2": 0.43,
        "O2": 0.96, "CO": 1.0, "CO2": 1.4, "H2O": 0.93, "N2": 1.0,
    }  # fmt: skip
    assert dict(vacuum.CRC_SENSITIVITIES) == expected
    assert "CRC" in vacuum.CRC_SENSITIVITIES.source
    assert "Redhead" in vacuum.CRC_SENSITIVITIES.source
    assert "15 %" in vacuum.CRC_SENSITIVITIES.source


def test_sensitivity_table_is_read_only():
    with pytest.raises(TypeError):
        vacuum.CRC_SENSITIVITIES.factors["Ar"] = 1.29  # type: ignore[index]
    with pytest.raises(AttributeError):
        vacuum.CRC_SENSITIVITIES.source = "other"  # type: ignore[misc]


def test_argon_reading_corrected_with_crc_factor():
    # REFERENCES.md §3 (CRC Handbook, Redhead): 1.0e-6 mbar read for Ar is 7.14e-7 mbar
    true = vacuum.true_pressure(1.0e-6, "Ar")
    assert true == printed("7.14e-7")
    assert true == pytest.approx(1.0e-6 / 1.4, rel=1e-12)


def test_gauge_gas_other_than_nitrogen():
    # true = indicated × S(gauge gas) / S(gas): an Ar-calibrated gauge reads Ar truly
    assert vacuum.true_pressure(2e-6, "Ar", gauge_gas="Ar") == pytest.approx(2e-6, rel=1e-15)
    # and reads N2 low by 1/1.4
    assert vacuum.true_pressure(1e-6, "N2", gauge_gas="Ar") == pytest.approx(1.4e-6, rel=1e-12)


def test_overrides_replace_one_gas_and_keep_the_rest():
    # a gauge maker's Ar factor, REFERENCES.md §3: one manual gives Ar = 1.34 with
    # 5e-6 Pa indicated -> 3.7e-6 Pa true
    assert vacuum.true_pressure(5e-6, "Ar", sensitivities={"Ar": 1.34}) == printed("3.7e-6")
    assert vacuum.true_pressure(1e-6, "He", sensitivities={"Ar": 1.34}) == pytest.approx(
        1e-6 / 0.18, rel=1e-12
    )
    table = vacuum.CRC_SENSITIVITIES.with_overrides({"argon": 1.29, "SF6": 2.5})
    assert table["Ar"] == 1.29
    assert table["SF6"] == 2.5
    assert table["Xe"] == 2.7
    assert "overridden" in table.source
    assert vacuum.CRC_SENSITIVITIES["Ar"] == 1.4  # the default table is untouched


def test_gas_names_are_normalised():
    assert vacuum.normalize_gas("argon") == "Ar"
    assert vacuum.normalize_gas(" ar ") == "Ar"
    assert vacuum.normalize_gas("N₂") == "N2"
    assert vacuum.normalize_gas("h2o") == "H2O"
    assert vacuum.normalize_gas("Carbon Monoxide") == "CO"
    assert vacuum.gas_correction_factor("xenon") == pytest.approx(1 / 2.7, rel=1e-12)


@pytest.mark.parametrize("gas", ["SF6", "Unobtainium", "", "  "])
def test_unknown_gas_raises(gas):
    with pytest.raises(UnknownNameError) as info:
        vacuum.true_pressure(1e-6, gas)
    assert info.value.argument == "gas"


@pytest.mark.parametrize("bad", [-1e-6, float("nan"), float("inf"), "1e-6", None])
def test_invalid_indicated_pressure_raises(bad):
    with pytest.raises(ScienceInputError, match="indicated"):
        vacuum.true_pressure(bad, "Ar")


def test_non_positive_override_raises():
    with pytest.raises(ScienceInputError, match="sensitivity"):
        vacuum.true_pressure(1e-6, "Ar", sensitivities={"Ar": 0.0})


# --- exposure -------------------------------------------------------------------------------


def test_worked_doses():
    # REFERENCES.md §2, Wikipedia 'Langmuir (unit)': 2.5e-6 Torr × 40 s = 100 L
    assert vacuum.exposure_langmuir(2.5e-6 * TORR_IN_MBAR, 40) == pytest.approx(100, rel=1e-12)
    # REFERENCES.md §2, FIELD.md §1.2: 1e-8 Torr × 100 s = 1 L
    assert vacuum.exposure_langmuir(1e-8 * TORR_IN_MBAR, 100) == pytest.approx(1, rel=1e-12)
    # REFERENCES.md §2, Wikipedia (older version): 2.5e-6 mbar × 53 s = 99.4 L
    assert vacuum.exposure_langmuir(2.5e-6, 53) == printed("99.4")
    # REFERENCES.md §2: 1e-6 mbar × 100 s = 75.0 L
    assert vacuum.exposure_langmuir(1e-6, 100) == printed("75.0")


def test_exposure_recomputed_from_scipy():
    # scipy.constants: L = p[Pa]·t / (1e-6 · torr)
    p_mbar, t = 3.7e-7, 1234.5
    expected = p_mbar * 100 * t / (1e-6 * sc.torr)
    assert vacuum.exposure_langmuir(p_mbar, t) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("pressure", "duration", "argument"),
    [(-1e-6, 10, "pressure_mbar"), (1e-6, -1, "duration_s"), (float("nan"), 1, "pressure_mbar"),
     (1e-6, float("inf"), "duration_s")],
)  # fmt: skip
def test_invalid_exposure_raises(pressure, duration, argument):
    with pytest.raises(ScienceInputError) as info:
        vacuum.exposure_langmuir(pressure, duration)
    assert info.value.argument == argument
    assert argument in str(info.value)


# --- molar masses ---------------------------------------------------------------------------

_COOLPROP_NAMES = {
    "N2": "Nitrogen", "CO": "CarbonMonoxide", "O2": "Oxygen", "H2": "Hydrogen",
    "H2O": "Water", "Ar": "Argon", "He": "Helium", "Ne": "Neon", "Kr": "Krypton",
    "Xe": "Xenon", "CO2": "CarbonDioxide", "D2": "Deuterium", "NH3": "Ammonia",
    "C2H4": "Ethylene",
}  # fmt: skip


@pytest.mark.parametrize(("gas", "fluid"), sorted(_COOLPROP_NAMES.items()))
def test_molar_masses_agree_with_coolprop(gas, fluid):
    # CoolProp PropsSI('M', fluid) in kg/mol; atomic-weight editions differ by < 1e-4
    assert vacuum.molar_mass_kg_per_mol(gas) == pytest.approx(PropsSI("M", fluid), rel=1e-4)


def test_molar_mass_table_covers_the_common_gases_and_no_is_n_plus_o():
    expected = {"N2", "CO", "O2", "H2", "H2O", "Ar", "He", "Ne", "Kr", "Xe", "CO2", "D2",
                "NO", "NH3", "C2H4"}  # fmt: skip
    assert set(vacuum.MOLAR_MASS_G_PER_MOL) == expected
    weights = vacuum.STANDARD_ATOMIC_WEIGHTS_G_PER_MOL
    assert vacuum.MOLAR_MASS_G_PER_MOL["NO"] == pytest.approx(weights["N"] + weights["O"])
    # a formula of known elements that is not in the table
    assert vacuum.molar_mass_kg_per_mol("CH4") == pytest.approx(
        PropsSI("M", "Methane"), rel=1e-4
    )  # CoolProp


@pytest.mark.parametrize("bad", ["C(H3)2", "Fe2O3", "2H", "H0"])
def test_bad_formulas_raise(bad):
    with pytest.raises(UnknownNameError):
        vacuum.molar_mass_kg_per_mol(bad)


# --- Hertz–Knudsen --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("gas", "value"),
    [("N2", "3.832e14"), ("CO", "3.832e14"), ("O2", "3.585e14"), ("H2", "1.428e15"),
     ("H2O", "4.778e14"), ("Ar", "3.209e14")],
)  # fmt: skip
def test_impingement_rate_at_1e_6_torr_300_k(gas, value):
    # REFERENCES.md §2 (kinetic gas theory; SC), 1e-6 Torr, 300 K
    pressure_mbar = 1e-6 * TORR_IN_MBAR
    rate = vacuum.impingement_rate_per_cm2_s(pressure_mbar, gas, 300.0)
    assert rate == printed(value)
    # recomputed from scipy.constants with the same molar mass
    expected = hertz_knudsen_scipy(pressure_mbar * 100, vacuum.MOLAR_MASS_G_PER_MOL[gas], 300)
    assert rate == pytest.approx(expected, rel=1e-12)


def test_impingement_rate_of_n2_at_1e_6_mbar():
    # REFERENCES.md §2: N2 at 1e-6 mbar, 300 K: 2.874e14 cm⁻² s⁻¹
    assert vacuum.impingement_rate_per_cm2_s(1e-6, "N2", 300.0) == printed("2.874e14")


def test_si_flux_and_practical_prefactor():
    # REFERENCES.md §2 practical form: Z = 3.513e22 p[Torr]/sqrt(M T) = 2.635e22 p[mbar]/sqrt(M T)
    m_kg = vacuum.molar_mass_kg_per_mol("N2")
    m_g = m_kg * 1e3
    per_m2 = vacuum.hertz_knudsen_flux(sc.torr, m_kg, 300.0)
    assert per_m2 / 1e4 * math.sqrt(m_g * 300) == printed("3.513e22")
    per_cm2 = vacuum.hertz_knudsen_flux_per_cm2_s(100.0, m_kg, 300.0)
    assert per_cm2 * math.sqrt(m_g * 300) == printed("2.635e22")
    assert per_m2 == pytest.approx(1e4 * vacuum.hertz_knudsen_flux_per_cm2_s(sc.torr, m_kg, 300))


def test_one_langmuir_of_co_and_time_to_a_monolayer():
    # REFERENCES.md §2: 1 L of CO at 300 K is 3.83e14 cm⁻² = 0.217 ML of Cu(111)
    dose = vacuum.impingement_per_cm2(1e-6 * TORR_IN_MBAR, 1.0, "CO", 300.0)
    assert dose == printed("3.83e14")
    assert dose / monolayer_density_per_cm2("Cu(111)") == printed("0.217")
    # REFERENCES.md §2/§8: 1 ML of Cu(111) at 1e-10 mbar N2, 300 K takes 17 h
    rate = vacuum.impingement_rate_per_cm2_s(1e-10, "N2", 300.0)
    assert monolayer_density_per_cm2("Cu(111)") / rate / 3600 == printed("17")


def test_default_temperature_is_295_k():
    # chamber at room temperature (common practice) unless told otherwise
    at_default = vacuum.impingement_per_cm2(1e-6, 10.0, "N2")
    assert at_default == pytest.approx(vacuum.impingement_per_cm2(1e-6, 10.0, "N2", 295.0))
    assert at_default == pytest.approx(
        10.0 * hertz_knudsen_scipy(1e-4, vacuum.MOLAR_MASS_G_PER_MOL["N2"], 295.0), rel=1e-12
    )


@pytest.mark.parametrize(
    ("kwargs", "argument"),
    [
        ({"pressure_pa": -1.0, "molar_mass_kg_per_mol": 0.028, "temperature_k": 300},
         "pressure_pa"),
        ({"pressure_pa": 1.0, "molar_mass_kg_per_mol": 0.0, "temperature_k": 300},
         "molar_mass_kg_per_mol"),
        ({"pressure_pa": 1.0, "molar_mass_kg_per_mol": 0.028, "temperature_k": 0.0},
         "temperature_k"),
        ({"pressure_pa": 1.0, "molar_mass_kg_per_mol": 0.028, "temperature_k": float("nan")},
         "temperature_k"),
    ],
)  # fmt: skip
def test_invalid_hertz_knudsen_raises(kwargs, argument):
    with pytest.raises(ScienceInputError) as info:
        vacuum.hertz_knudsen_flux(**kwargs)
    assert info.value.argument == argument


# --- vacuum ranges --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("pressure_mbar", "name_2019", "name_1981"),
    [
        (1013.25, "low", "low"),
        (1.0, "low", "low"),
        (0.5, "medium", "medium"),
        (1e-3, "medium", "medium"),
        (9.9e-4, "high", "high"),
        (1e-7, "high", "high"),
        (5e-8, "high", "ultra-high"),
        (1e-8, "high", "ultra-high"),
        (9e-9, "ultra-high", "ultra-high"),
        (1e-11, "ultra-high", "ultra-high"),
        (5e-12, "extreme-high", "ultra-high"),
    ],
)
def test_vacuum_ranges(pressure_mbar, name_2019, name_1981):
    # REFERENCES.md §5: ISO 3529-1:2019 (boundaries MEM) and ISO 3529-1:1981 (SRCH)
    in_2019 = vacuum.vacuum_range(pressure_mbar)
    assert in_2019.name == name_2019
    assert in_2019.convention == "ISO 3529-1:2019"
    in_1981 = vacuum.vacuum_range(pressure_mbar, "ISO 3529-1:1981")
    assert in_1981.name == name_1981
    assert in_1981.convention == "ISO 3529-1:1981"
    for found in (in_2019, in_1981):
        assert found.lower_mbar is None or pressure_mbar >= found.lower_mbar
        assert found.upper_mbar is None or pressure_mbar < found.upper_mbar


def test_range_carries_bounds_and_label():
    uhv = vacuum.vacuum_range(2e-10)
    assert (uhv.lower_mbar, uhv.upper_mbar) == (1e-11, 1e-8)
    assert "UHV" in uhv.label
    assert vacuum.vacuum_range(2e-10, "DIN 28400-1").convention == "ISO 3529-1:1981"


@pytest.mark.parametrize(
    ("pressure", "convention", "error"),
    [(0.0, "ISO 3529-1:2019", ScienceInputError), (-1.0, "ISO 3529-1:2019", ScienceInputError),
     (float("nan"), "ISO 3529-1:2019", ScienceInputError),
     (2000.0, "ISO 3529-1:2019", OutOfRangeError), (1e-9, "vendor", UnknownNameError)],
)  # fmt: skip
def test_invalid_vacuum_range_raises(pressure, convention, error):
    with pytest.raises(error):
        vacuum.vacuum_range(pressure, convention)


# --- properties -----------------------------------------------------------------------------

# zero, or 1e-15 mbar up to 1 bar (subnormal floats would lose relative precision)
pressures = st.one_of(st.just(0.0), st.floats(min_value=1e-15, max_value=1e3))
durations = st.one_of(st.just(0.0), st.floats(min_value=1e-6, max_value=1e6))
gases = st.sampled_from(sorted(vacuum.CRC_SENSITIVITIES))


@settings(max_examples=200, deadline=None)
@given(p=pressures, t=durations, gas=gases, temperature=st.floats(1.0, 1000.0))
def test_property_valid_inputs_give_finite_non_negative_results(p, t, gas, temperature):
    exposure = vacuum.exposure_langmuir(p, t)
    corrected = vacuum.true_pressure(p, gas)
    impinged = vacuum.impingement_per_cm2(corrected, t, gas, temperature)
    for value in (exposure, corrected, impinged):
        assert math.isfinite(value)
        assert value >= 0
    # exposure is linear in pressure, so the corrected exposure scales with the factor
    assert vacuum.exposure_langmuir(corrected, t) == pytest.approx(
        exposure * vacuum.gas_correction_factor(gas), rel=1e-12, abs=1e-300
    )


@settings(max_examples=100, deadline=None)
@given(p=st.floats(max_value=-1e-300), t=durations)
def test_property_negative_pressure_raises(p, t):
    with pytest.raises(ScienceInputError):
        vacuum.exposure_langmuir(p, t)
    with pytest.raises(ScienceInputError):
        vacuum.impingement_per_cm2(p, t, "N2")


@settings(max_examples=100, deadline=None)
@given(p=st.floats(min_value=1e-20, max_value=1100.0))
def test_property_every_vacuum_pressure_has_one_range(p):
    found = vacuum.vacuum_range(p)
    assert found.name in {"low", "medium", "high", "ultra-high", "extreme-high"}
    assert found.lower_mbar is None or p >= found.lower_mbar
    assert found.upper_mbar is None or p < found.upper_mbar
