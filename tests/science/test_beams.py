"""Ion fluence and flux of sputter doses (REFERENCES.md §4), checked with scipy.constants."""

import math

import pytest
import scipy.constants as sc
from hypothesis import given, settings
from hypothesis import strategies as st

from labbook.science import beams
from labbook.science.errors import ScienceInputError
from labbook.science.surfaces import monolayer_density_per_cm2
from tests.science.published import printed


def test_fluence_1_ua_10_min_1_cm2():
    # REFERENCES.md §4 (definition, SC): 1 µA, 10 min, 1 cm² = 3.745e15 ions/cm²
    fluence = beams.ion_fluence_per_cm2(1e-6, 600.0, 1.0)
    assert fluence == printed("3.745e15")
    # scipy.constants: Φ = I·t / (e·A)
    assert fluence == pytest.approx(1e-6 * 600.0 / (sc.e * 1.0), rel=1e-12)


def test_charge_of_that_dose():
    # REFERENCES.md §4: 0.600 mC
    assert beams.beam_charge_c(1e-6, 600.0) == pytest.approx(0.600e-3, rel=1e-12)


def test_flux_for_1_ua_per_cm2():
    # REFERENCES.md §4 (SC): 6.2415e12 ions cm⁻² s⁻¹
    flux = beams.ion_flux_per_cm2_s(1e-6, 1.0)
    assert flux == printed("6.2415e12")
    assert flux == pytest.approx(1e-6 / sc.e, rel=1e-12)  # scipy.constants


def test_fluence_in_cu111_monolayer_equivalents():
    # REFERENCES.md §4: ≈ 2.12 Cu(111) ML-equivalents
    fluence = beams.ion_fluence_per_cm2(1e-6, 600.0, 1.0)
    assert beams.fluence_in_monolayers(fluence, monolayer_density_per_cm2("Cu(111)")) == (
        printed("2.12")
    )


def test_area_charge_state_and_secondary_electrons():
    base = beams.ion_fluence_per_cm2(5e-6, 900.0, 0.5)
    assert base == pytest.approx(5e-6 * 900.0 / (sc.e * 0.5), rel=1e-12)  # scipy.constants
    # q·e per ion: twice the charge, half the ions
    assert beams.ion_fluence_per_cm2(5e-6, 900.0, 0.5, charge_state=2) == pytest.approx(base / 2)
    # REFERENCES.md §4 caveat: ion current = I / (1 + γ); γ ≈ 0.1 for keV Ar⁺ (MEM)
    corrected = beams.ion_fluence_per_cm2(5e-6, 900.0, 0.5, secondary_electron_yield=0.1)
    assert corrected == pytest.approx(base / 1.1, rel=1e-12)


def test_flux_times_duration_is_fluence():
    flux = beams.ion_flux_per_cm2_s(2e-6, 0.8, charge_state=1, secondary_electron_yield=0.05)
    fluence = beams.ion_fluence_per_cm2(2e-6, 1800, 0.8, secondary_electron_yield=0.05)
    assert fluence == pytest.approx(flux * 1800, rel=1e-12)


@pytest.mark.parametrize(
    ("kwargs", "argument"),
    [
        ({"current_a": -1e-6}, "current_a"),
        ({"duration_s": -1.0}, "duration_s"),
        ({"beam_area_cm2": 0.0}, "beam_area_cm2"),
        ({"beam_area_cm2": -1.0}, "beam_area_cm2"),
        ({"charge_state": 0}, "charge_state"),
        ({"charge_state": 1.5}, "charge_state"),
        ({"charge_state": True}, "charge_state"),
        ({"secondary_electron_yield": -0.1}, "secondary_electron_yield"),
        ({"current_a": float("nan")}, "current_a"),
        ({"duration_s": float("inf")}, "duration_s"),
        ({"current_a": "1 uA"}, "current_a"),
    ],
)
def test_invalid_input_raises_naming_the_argument(kwargs, argument):
    arguments = {"current_a": 1e-6, "duration_s": 600.0, "beam_area_cm2": 1.0, **kwargs}
    with pytest.raises(ScienceInputError) as info:
        beams.ion_fluence_per_cm2(**arguments)
    assert info.value.argument == argument
    assert argument in str(info.value)


def test_fluence_in_monolayers_needs_a_density():
    with pytest.raises(ScienceInputError, match="monolayer_density_per_cm2"):
        beams.fluence_in_monolayers(1e15, 0.0)


@settings(max_examples=200, deadline=None)
@given(
    # zero, or fA to mA (subnormal floats lose the relative precision the check asks for)
    current=st.one_of(st.just(0.0), st.floats(1e-15, 1e-3)),
    duration=st.one_of(st.just(0.0), st.floats(1e-6, 1e5)),
    area=st.floats(1e-4, 10),
    charge=st.integers(1, 10),
    gamma=st.floats(0, 5),
)
def test_property_fluence_is_finite_non_negative_and_linear(current, duration, area, charge, gamma):
    fluence = beams.ion_fluence_per_cm2(current, duration, area, charge, gamma)
    assert math.isfinite(fluence)
    assert fluence >= 0
    expected = current * duration / ((1 + gamma) * charge * sc.e * area)  # scipy.constants
    assert fluence == pytest.approx(expected, rel=1e-12, abs=1e-300)


@settings(max_examples=100, deadline=None)
@given(area=st.one_of(st.floats(max_value=0.0), st.just(float("nan"))))
def test_property_non_positive_area_raises(area):
    with pytest.raises(ScienceInputError):
        beams.ion_flux_per_cm2_s(1e-6, area)
