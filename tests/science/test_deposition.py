"""Coverage, QCM (Sauerbrey) conversions and rate-calibration fits (REFERENCES.md §6–7)."""

import math

import numpy as np
import pytest
import scipy.constants as sc
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from labbook.science import deposition
from labbook.science.deposition import (
    BULK_MATERIALS,
    RateCalibration,
    angstrom_per_s_to_ml_per_min,
    coverage_ml,
    fit_rate_calibration,
    qcm_frequency_shift_hz,
    qcm_thickness_angstrom,
    rate_from_qcm,
    sauerbrey_sensitivity_hz_cm2_per_ug,
)
from labbook.science.errors import ScienceInputError
from labbook.science.surfaces import LATTICE_CONSTANTS, monolayer_density_per_cm2
from tests.science.published import printed


def ml_per_min(material, substrate, rate_angstrom_per_s=0.1, tooling_factor=1.0):
    bulk = BULK_MATERIALS[material]
    return angstrom_per_s_to_ml_per_min(
        rate_angstrom_per_s,
        bulk.density_g_cm3,
        bulk.molar_mass_g_per_mol,
        monolayer_density_per_cm2(substrate),
        tooling_factor,
    )


# --- coverage -------------------------------------------------------------------------------


def test_coverage_is_rate_times_time():
    assert coverage_ml(0.5, 120.0) == pytest.approx(1.0)
    assert coverage_ml(0.0, 120.0) == 0.0
    assert coverage_ml(2.883, 0.0) == 0.0


@pytest.mark.parametrize(
    ("rate", "duration", "argument"),
    [(-0.1, 10, "rate_ml_per_min"), (0.1, -10, "duration_s"), (float("nan"), 1, "rate_ml_per_min")],
)
def test_invalid_coverage_raises(rate, duration, argument):
    with pytest.raises(ScienceInputError) as info:
        coverage_ml(rate, duration)
    assert info.value.argument == argument


# --- Sauerbrey ------------------------------------------------------------------------------


def test_sauerbrey_sensitivity():
    # REFERENCES.md §7 (SC): C_f = 2 f0²/√(ρ_q μ_q): 81.50 Hz cm²/µg at 6 MHz, 56.60 at 5 MHz
    assert sauerbrey_sensitivity_hz_cm2_per_ug(6e6) == printed("81.50")
    assert sauerbrey_sensitivity_hz_cm2_per_ug(5e6) == printed("56.60")
    # 1 Hz ≙ 12.27 ng/cm² (6 MHz) and 17.67 ng/cm² (5 MHz)
    assert 1e3 / sauerbrey_sensitivity_hz_cm2_per_ug(6e6) == printed("12.27")
    assert 1e3 / sauerbrey_sensitivity_hz_cm2_per_ug(5e6) == printed("17.67")
    # recomputed in SI: Z_q = √(ρ μ) = 8.834e6 kg m⁻² s⁻¹ (REFERENCES.md §7)
    z_q = math.sqrt(2648.0 * 2.947e10)  # kg/m³ and Pa
    assert z_q == printed("8.834e6")
    c_f_si = 2 * 6e6**2 / z_q  # Hz m²/kg; 1 m²/kg = 1e4 cm² / 1e9 µg
    assert sauerbrey_sensitivity_hz_cm2_per_ug(6e6) == pytest.approx(c_f_si * 1e4 / 1e9)


@pytest.mark.parametrize(
    ("material", "shift"), [("Cu", "-7.30"), ("Au", "-15.73"), ("Ag", "-8.55")]
)
def test_one_angstrom_on_a_6_mhz_crystal(material, shift):
    # REFERENCES.md §7: 1 Å of Cu → −7.30 Hz; Au −15.73 Hz; Ag −8.55 Hz
    density = BULK_MATERIALS[material].density_g_cm3
    assert qcm_frequency_shift_hz(1.0, density, 6e6) == printed(shift)
    # and back
    back = qcm_thickness_angstrom(qcm_frequency_shift_hz(1.0, density, 6e6), density, 6e6)
    assert back == pytest.approx(1.0, rel=1e-12)


def test_positive_frequency_shift_is_refused():
    with pytest.raises(ScienceInputError, match="lowers the crystal frequency"):
        qcm_thickness_angstrom(+3.0, 8.96, 6e6)


def test_bulk_materials_have_sources():
    for material in ("Cu", "Ag", "Au"):
        assert "MEM" in BULK_MATERIALS[material].source
    assert deposition.bulk_material(" Au ").molar_mass_g_per_mol == pytest.approx(196.96657)
    with pytest.raises(ScienceInputError):
        deposition.bulk_material("C60")


# --- Å/s → ML/min ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("material", "substrate", "value"),
    [
        ("Cu", "Cu(111)", "2.883"),
        ("Cu", "Cu(100)", "3.329"),
        ("Ag", "Ag(111)", "2.539"),
        ("Au", "Au(111)", "2.550"),
        ("Au", "Si(111)", "4.522"),
        ("Cu", "Si(111)", "6.507"),
    ],
)
def test_rate_in_ml_per_min_for_0_1_angstrom_per_s(material, substrate, value):
    # REFERENCES.md §7 worked examples (SC)
    assert ml_per_min(material, substrate) == printed(value)
    # recomputed with scipy.constants.N_A
    bulk = BULK_MATERIALS[material]
    expected = (
        60 * 0.1 * 1e-8 * bulk.density_g_cm3 * sc.N_A
        / (bulk.molar_mass_g_per_mol * monolayer_density_per_cm2(substrate))
    )  # fmt: skip
    assert ml_per_min(material, substrate) == pytest.approx(expected, rel=1e-12)


def test_rate_via_the_lattice_spacing():
    # REFERENCES.md §7: with the density of the lattice itself, 6 Å/min ÷ d111 (2.087 Å) = 2.875
    a_cm = LATTICE_CONSTANTS["Cu"].a_angstrom * 1e-8
    molar_mass = BULK_MATERIALS["Cu"].molar_mass_g_per_mol
    lattice_density = 4 * molar_mass / (sc.N_A * a_cm**3)  # 4 atoms per fcc cell
    rate = angstrom_per_s_to_ml_per_min(
        0.1, lattice_density, molar_mass, monolayer_density_per_cm2("Cu(111)")
    )
    assert rate == printed("2.875")
    assert rate == pytest.approx(6.0 / (LATTICE_CONSTANTS["Cu"].a_angstrom / math.sqrt(3)))


def test_one_monolayer_of_cu_in_angstrom():
    # REFERENCES.md §6: 1 ML of Cu(111) ≙ 2.081 Å of bulk Cu (ρ 8.96 g/cm³)
    one_ml_per_min_in_angstrom_per_s = 0.1 / ml_per_min("Cu", "Cu(111)")
    assert one_ml_per_min_in_angstrom_per_s * 60 == printed("2.081")


def test_tooling_factor_scales_the_rate():
    assert ml_per_min("Cu", "Cu(111)", tooling_factor=0.8) == pytest.approx(
        0.8 * ml_per_min("Cu", "Cu(111)"), rel=1e-12
    )
    with pytest.raises(ScienceInputError, match="tooling_factor"):
        ml_per_min("Cu", "Cu(111)", tooling_factor=0.0)


def test_rate_from_qcm_frequency_drop():
    # 0.1 Å/s of Cu for 60 s is 6 Å on the crystal: Δf from Sauerbrey, then back to ML/min
    density = BULK_MATERIALS["Cu"].density_g_cm3
    shift = qcm_frequency_shift_hz(6.0, density, 5.98e6)
    rate = rate_from_qcm(
        shift,
        60.0,
        f0_hz=5.98e6,
        density_g_cm3=density,
        molar_mass_g_per_mol=BULK_MATERIALS["Cu"].molar_mass_g_per_mol,
        monolayer_density_per_cm2=monolayer_density_per_cm2("Cu(111)"),
        tooling_factor=1.25,
    )
    assert rate == pytest.approx(1.25 * ml_per_min("Cu", "Cu(111)"), rel=1e-12)
    with pytest.raises(ScienceInputError, match="duration_s"):
        rate_from_qcm(
            shift, 0.0, f0_hz=6e6, density_g_cm3=8.96, molar_mass_g_per_mol=63.5,
            monolayer_density_per_cm2=1.767e15,
        )  # fmt: skip


# --- rate calibration fits ------------------------------------------------------------------


def synthetic_constant(rng, rate=0.30, sigma=0.02, n=10):
    durations = np.linspace(60.0, 900.0, n)
    coverages = rate * durations / 60.0 + rng.normal(0.0, sigma, n)
    return durations, np.abs(coverages)


def constant_points(durations, coverages):
    return [(None, t, c) for t, c in zip(durations, coverages, strict=True)]


def test_constant_rate_recovered_and_matches_curve_fit():
    rng = np.random.default_rng(20240611)
    durations, coverages = synthetic_constant(rng)
    calibration = fit_rate_calibration(constant_points(durations, coverages))
    assert calibration.model == "constant"
    assert calibration.n_points == 10
    # the stated uncertainty covers the truth (3σ)
    assert abs(calibration.rate_ml_per_min - 0.30) < 3 * calibration.uncertainty_ml_per_min
    # scipy.optimize.curve_fit, model c = R·t (t in min), covariance scaled by χ²/(n−1)
    popt, pcov = optimize.curve_fit(lambda x, r: r * x, durations / 60.0, coverages, p0=[0.1])
    assert calibration.rate_ml_per_min == pytest.approx(popt[0], rel=1e-9)
    assert calibration.uncertainty_ml_per_min == pytest.approx(math.sqrt(pcov[0, 0]), rel=1e-6)
    residuals = coverages - popt[0] * durations / 60.0
    # residual std with n − 1 = 9 degrees of freedom (one fitted parameter)
    assert calibration.residual_std == pytest.approx(math.sqrt(np.sum(residuals**2) / 9), rel=1e-9)
    rate, uncertainty = calibration.predict()
    assert (rate, uncertainty) == (calibration.rate_ml_per_min, calibration.uncertainty_ml_per_min)
    coverage, u_coverage = calibration.predict_coverage(300.0)
    assert coverage == pytest.approx(rate * 5.0)
    assert u_coverage == pytest.approx(uncertainty * 5.0)


def test_constant_rate_uncertainty_is_calibrated():
    # Over many synthetic calibrations, |R − R_true| < u about 66 % of the time (Student t,
    # 9 degrees of freedom: 0.657) and < 2u about 92 % (0.924).
    rng = np.random.default_rng(7)
    within_1, within_2, trials = 0, 0, 400
    for _ in range(trials):
        durations, coverages = synthetic_constant(rng)
        fit = fit_rate_calibration(constant_points(durations, coverages))
        error = abs(fit.rate_ml_per_min - 0.30)
        within_1 += error < fit.uncertainty_ml_per_min
        within_2 += error < 2 * fit.uncertainty_ml_per_min
    assert 0.58 < within_1 / trials < 0.74
    assert 0.88 < within_2 / trials < 0.97


def test_proportional_to_flux_current():
    rng = np.random.default_rng(3)
    k_true = 0.012  # ML/min per nA of flux current
    flux_na = np.array([10.0, 15.0, 20.0, 25.0, 30.0, 40.0])
    durations = np.array([600.0, 300.0, 450.0, 200.0, 300.0, 120.0])
    coverages = k_true * flux_na * durations / 60 + rng.normal(0, 0.005, flux_na.size)
    points = list(zip(flux_na, durations, coverages, strict=True))
    fit = fit_rate_calibration(points, model="proportional")
    x = flux_na * durations / 60
    popt, pcov = optimize.curve_fit(lambda v, k: k * v, x, coverages, p0=[0.01])  # scipy
    assert fit.parameters[0] == pytest.approx(popt[0], rel=1e-9)
    assert math.sqrt(fit.covariance[0][0]) == pytest.approx(math.sqrt(pcov[0, 0]), rel=1e-6)
    rate, uncertainty = fit.predict(22.0)
    assert rate == pytest.approx(popt[0] * 22.0, rel=1e-9)
    assert abs(rate - k_true * 22.0) < 3 * uncertainty
    assert fit.reference_setting == pytest.approx(flux_na.mean())
    assert fit.rate_ml_per_min == pytest.approx(popt[0] * flux_na.mean(), rel=1e-9)


EA_EV = 2.5  # activation energy of the synthetic source
PREFACTOR = 1.0e8  # ML/min


def true_rate(temperature_k):
    return PREFACTOR * np.exp(-EA_EV * sc.e / (sc.k * temperature_k))


def synthetic_arrhenius(rng, sigma=0.05):
    temperatures = np.array([900.0, 925.0, 950.0, 975.0, 1000.0, 1025.0, 1050.0, 1075.0])
    durations = np.full(temperatures.size, 600.0)
    coverages = true_rate(temperatures) * 10.0 * np.exp(rng.normal(0, sigma, temperatures.size))
    return temperatures, durations, coverages


def test_arrhenius_fit_matches_linregress_and_polyfit():
    rng = np.random.default_rng(11)
    temperatures, durations, coverages = synthetic_arrhenius(rng)
    fit = fit_rate_calibration(
        list(zip(temperatures, durations, coverages, strict=True)), model="arrhenius"
    )
    x = 1 / temperatures
    y = np.log(coverages / (durations / 60))
    reference = stats.linregress(x, y)  # scipy.stats.linregress
    slope = fit.parameters[1]
    assert slope == pytest.approx(reference.slope, rel=1e-9)
    assert math.sqrt(fit.covariance[1][1]) == pytest.approx(reference.stderr, rel=1e-9)
    # numpy.polyfit(cov=True): the same line and covariance in the uncentred variables
    coefficients, covariance = np.polyfit(x, y, 1, cov=True)
    for temperature in (930.0, 1000.0, 1100.0):
        rate, uncertainty = fit.predict(temperature)
        basis = np.array([1 / temperature, 1.0])
        log_rate = basis @ coefficients
        log_sd = math.sqrt(basis @ covariance @ basis)
        assert rate == pytest.approx(math.exp(log_rate), rel=1e-9)
        assert uncertainty == pytest.approx(math.exp(log_rate) * log_sd, rel=1e-6)
        # the stated uncertainty covers the truth (3σ)
        assert abs(rate - true_rate(temperature)) < 3 * uncertainty
    assert fit.residual_std == pytest.approx(
        math.sqrt(np.sum((y - np.polyval(coefficients, x)) ** 2) / (len(x) - 2)), rel=1e-9
    )
    # E_a = −slope · k_B / e (scipy.constants), recovered within 3σ
    ea = fit.activation_energy_ev
    ea_sd = reference.stderr * sc.k / sc.e
    assert ea == pytest.approx(-reference.slope * sc.k / sc.e, rel=1e-9)
    assert abs(ea - EA_EV) < 3 * ea_sd
    # the reference setting is the centre of the data in 1/T
    assert fit.reference_setting == pytest.approx(1 / np.mean(x))


def test_arrhenius_prediction_uncertainty_is_calibrated():
    # at a new temperature inside the range, |ln R − ln R_true| < u/R about 64 % of the time
    # (Student t, 6 degrees of freedom: 0.644)
    rng = np.random.default_rng(5)
    hits, trials = 0, 400
    for _ in range(trials):
        temperatures, durations, coverages = synthetic_arrhenius(rng)
        fit = fit_rate_calibration(
            list(zip(temperatures, durations, coverages, strict=True)), model="arrhenius"
        )
        rate, uncertainty = fit.predict(990.0)
        hits += abs(math.log(rate / true_rate(990.0))) < uncertainty / rate
    assert 0.56 < hits / trials < 0.73


@pytest.mark.parametrize(
    ("points", "model", "match"),
    [
        ([(None, 60, 0.3)], "constant", "at least 2"),
        ([(900, 60, 0.3), (950, 60, 0.5)], "arrhenius", "at least 3"),
        ([(None, 0, 0.3), (None, 60, 0.3)], "constant", "duration_s"),
        ([(None, 60, -0.3), (None, 60, 0.3)], "constant", "coverage_ml"),
        ([(None, 60, float("nan")), (None, 60, 0.3)], "constant", "coverage_ml"),
        ([(900, 60, 0.0), (950, 60, 0.3), (1000, 60, 0.5)], "arrhenius", "ln"),
        ([(900, 60, 0.1), (900, 60, 0.3), (900, 60, 0.5)], "arrhenius", "two or more"),
        ([(-900, 60, 0.1), (900, 60, 0.3), (950, 60, 0.5)], "arrhenius", "temperature_k"),
        ([(None, 60, 0.1), (None, 60, 0.3)], "proportional", "setting"),
        ([(None, 60), (None, 60, 0.3)], "constant", "points\\[0\\]"),
        ([(None, 60, 0.1), (None, 60, 0.3)], "linear", "model"),
    ],
)
def test_invalid_calibrations_raise(points, model, match):
    with pytest.raises(ScienceInputError, match=match):
        fit_rate_calibration(points, model=model)


def test_predict_needs_a_setting_for_setting_dependent_models():
    fit = fit_rate_calibration([(900, 60, 0.1), (950, 60, 0.3), (1000, 60, 0.7)], "arrhenius")
    with pytest.raises(ScienceInputError, match="setting"):
        fit.predict()
    with pytest.raises(ScienceInputError, match="setting"):
        fit.predict(-5.0)
    # a (non-physical) rate falling with temperature, predicted near 0 K, overflows
    falling = fit_rate_calibration([(900, 60, 0.7), (950, 60, 0.3), (1000, 60, 0.1)], "arrhenius")
    with pytest.raises(ScienceInputError, match="overflows"):
        falling.predict(1e-3)


def test_rate_calibration_rebuilt_from_storage_is_checked():
    fit = fit_rate_calibration([(None, 60, 0.30), (None, 120, 0.61), (None, 180, 0.89)])
    rebuilt = RateCalibration(
        fit.model, fit.rate_ml_per_min, fit.uncertainty_ml_per_min, fit.n_points,
        fit.residual_std, fit.reference_setting, fit.parameters, fit.covariance,
    )  # fmt: skip
    assert rebuilt == fit
    with pytest.raises(ScienceInputError):
        RateCalibration("arrhenius", 1.0, 0.1, 3, 0.1, None, (0.0, -1.0), ((1, 0), (0, 1)))
    with pytest.raises(ScienceInputError):
        RateCalibration("constant", 1.0, 0.1, 3, 0.1, None, (1.0, 2.0), ((1.0,),))
    with pytest.raises(ScienceInputError):
        RateCalibration("cubic", 1.0, 0.1, 3, 0.1, None, (1.0,), ((1.0,),))


# --- properties -----------------------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(rate=st.floats(0, 100), duration=st.floats(0, 1e6))
def test_property_coverage_is_finite_and_non_negative(rate, duration):
    value = coverage_ml(rate, duration)
    assert math.isfinite(value)
    assert value >= 0


@settings(max_examples=100, deadline=None)
@given(
    rate=st.floats(1e-3, 10),
    durations=st.lists(st.floats(1, 1e4), min_size=2, max_size=8, unique=True),
)
def test_property_exact_data_gives_the_rate_with_no_scatter(rate, durations):
    points = [(None, t, rate * t / 60) for t in durations]
    fit = fit_rate_calibration(points)
    assert fit.rate_ml_per_min == pytest.approx(rate, rel=1e-9)
    assert fit.uncertainty_ml_per_min <= 1e-9 * rate
    assert math.isfinite(fit.residual_std)
    assert fit.residual_std >= 0


@settings(max_examples=100, deadline=None)
@given(duration=st.one_of(st.floats(max_value=0.0), st.just(float("nan"))))
def test_property_non_positive_duration_raises(duration):
    with pytest.raises(ScienceInputError):
        fit_rate_calibration([(None, duration, 0.1), (None, 60.0, 0.3)])
