"""Deposition: nominal coverage, QCM (Sauerbrey) rates and rate calibration fits.

Units: rates of deposition in ML/min (the trade's unit for evaporators), durations in s,
QCM frequencies in Hz, thicknesses in Å, densities in g/cm³, molar masses in g/mol,
monolayer densities in atoms/cm². Which "ML" is meant is the caller's
:class:`~labbook.science.surfaces.MonolayerDefinition`; here it enters only through
``monolayer_density_per_cm2``.

Sauerbrey (G. Sauerbrey, Z. Phys. 155, 206 (1959)): a thin rigid film of areal mass Δm/A
on an AT-cut quartz of fundamental frequency f0 shifts it by Δf = −C_f · Δm/A, with
C_f = 2 f0² / √(ρ_q μ_q). Valid for thin films in vacuum; the Z-ratio correction for thick
films is not applied (it matters only for thick films, from memory).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import Literal

import numpy as np

from labbook.science.constants import AVOGADRO_PER_MOL, BOLTZMANN_J_PER_K, ELEMENTARY_CHARGE_C
from labbook.science.errors import (
    ScienceInputError,
    UnknownNameError,
    finite_result,
    require_finite,
    require_non_negative,
    require_positive,
)

#: AT-cut quartz density ρ_q in g/cm³ and shear modulus μ_q in g cm⁻¹ s⁻² (REFERENCES.md §7:
#: the values used with the Sauerbrey equation in the QCM literature, SRCH).
QUARTZ_DENSITY_G_CM3 = 2.648
QUARTZ_SHEAR_MODULUS_G_CM_S2 = 2.947e11

ANGSTROM_CM = 1e-8
MICROGRAM_G = 1e-6
SECONDS_PER_MINUTE = 60.0


def coverage_ml(rate_ml_per_min: float, duration_s: float) -> float:
    """Nominal coverage (ML) deposited at a constant rate (ML/min) for a duration (s)."""
    rate = require_non_negative(rate_ml_per_min, "rate_ml_per_min")
    duration = require_non_negative(duration_s, "duration_s")
    return finite_result(
        rate * duration / SECONDS_PER_MINUTE, "coverage", "rate_ml_per_min", "duration_s"
    )


# --- QCM ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BulkMaterial:
    """Bulk density and molar mass of an evaporant, for converting Å to atoms."""

    name: str
    density_g_cm3: float
    molar_mass_g_per_mol: float
    source: str


#: Evaporants with their room-temperature bulk densities (library tables / from memory,
#: REFERENCES.md §7: LIB/MEM) and IUPAC standard atomic weights (from memory).
BULK_MATERIALS: Mapping[str, BulkMaterial] = MappingProxyType(
    {
        "Cu": BulkMaterial(
            "Cu", 8.96, 63.546, "density LIB/MEM; IUPAC standard atomic weight (from memory)"
        ),
        "Ag": BulkMaterial(
            "Ag", 10.49, 107.8682, "density LIB/MEM; IUPAC standard atomic weight (from memory)"
        ),
        "Au": BulkMaterial(
            "Au", 19.30, 196.966570, "density LIB/MEM; IUPAC standard atomic weight (from memory)"
        ),
    }
)


def bulk_material(name: str) -> BulkMaterial:
    """Look up an evaporant of :data:`BULK_MATERIALS` by its symbol."""
    try:
        return BULK_MATERIALS[name.strip()]
    except (KeyError, AttributeError):
        raise UnknownNameError(
            f"material {name!r} has no bulk data (known: {', '.join(BULK_MATERIALS)}); "
            "pass density_g_cm3 and molar_mass_g_per_mol",
            argument="material",
        ) from None


def sauerbrey_sensitivity_hz_cm2_per_ug(f0_hz: float) -> float:
    """Sauerbrey mass sensitivity C_f = 2 f0² / √(ρ_q μ_q) in Hz cm²/µg.

    81.50 Hz cm²/µg for a 6 MHz crystal (1 Hz ≙ 12.27 ng/cm²), 56.60 for 5 MHz.
    """
    f0 = require_positive(f0_hz, "f0_hz")
    # With ρ in g/cm³ and μ in g cm⁻¹ s⁻², √(ρμ) is in g cm⁻² s⁻¹, so C_f is in Hz cm²/g.
    per_gram = 2.0 * f0 * f0 / math.sqrt(QUARTZ_DENSITY_G_CM3 * QUARTZ_SHEAR_MODULUS_G_CM_S2)
    return per_gram * MICROGRAM_G


def qcm_frequency_shift_hz(thickness_angstrom: float, density_g_cm3: float, f0_hz: float) -> float:
    """Frequency shift (Hz, negative) for a film of given thickness (Å) on the crystal.

    1 Å of Cu (8.96 g/cm³) on a 6 MHz crystal: −7.30 Hz.
    """
    thickness = require_non_negative(thickness_angstrom, "thickness_angstrom")
    density = require_positive(density_g_cm3, "density_g_cm3")
    areal_mass_ug_cm2 = density * thickness * ANGSTROM_CM / MICROGRAM_G
    return -sauerbrey_sensitivity_hz_cm2_per_ug(f0_hz) * areal_mass_ug_cm2


def qcm_thickness_angstrom(frequency_shift_hz: float, density_g_cm3: float, f0_hz: float) -> float:
    """Film thickness (Å) on the crystal from a frequency shift (Hz; negative for a deposit).

    A positive shift is refused: a deposit lowers the frequency, and a rise means mass loss
    or thermal drift, not a film.
    """
    shift = require_finite(frequency_shift_hz, "frequency_shift_hz")
    if shift > 0:
        raise ScienceInputError(
            f"frequency_shift_hz is {shift!r} > 0: a deposit lowers the crystal frequency "
            "(give the shift as f_after − f_before)",
            argument="frequency_shift_hz",
        )
    density = require_positive(density_g_cm3, "density_g_cm3")
    areal_mass_ug_cm2 = -shift / sauerbrey_sensitivity_hz_cm2_per_ug(f0_hz)
    return areal_mass_ug_cm2 * MICROGRAM_G / density / ANGSTROM_CM


def angstrom_per_s_to_ml_per_min(
    rate_angstrom_per_s: float,
    density_g_cm3: float,
    molar_mass_g_per_mol: float,
    monolayer_density_per_cm2: float,
    tooling_factor: float = 1.0,
) -> float:
    """Convert a thickness rate (Å/s, bulk density) into ML/min.

    R = 60 · T · r · 1e-8 · ρ N_A / (M n_s): atoms per cm² per minute divided by the atoms per
    cm² of 1 ML. ``tooling_factor`` T = (thickness at the sample) / (thickness at the
    crystal), the usual film-thickness-monitor convention (common practice); pass 1.0 if the
    rate was already read at the sample position or the monitor applies T itself.
    0.1 Å/s of Cu on Cu(111) is 2.883 ML/min.
    """
    rate = require_non_negative(rate_angstrom_per_s, "rate_angstrom_per_s")
    density = require_positive(density_g_cm3, "density_g_cm3")
    molar_mass = require_positive(molar_mass_g_per_mol, "molar_mass_g_per_mol")
    n_s = require_positive(monolayer_density_per_cm2, "monolayer_density_per_cm2")
    tooling = require_positive(tooling_factor, "tooling_factor")
    atoms_per_cm3 = density * AVOGADRO_PER_MOL / molar_mass
    atoms_per_cm2_per_s = tooling * rate * ANGSTROM_CM * atoms_per_cm3
    return atoms_per_cm2_per_s * SECONDS_PER_MINUTE / n_s


def rate_from_qcm(
    frequency_shift_hz: float,
    duration_s: float,
    *,
    f0_hz: float,
    density_g_cm3: float,
    molar_mass_g_per_mol: float,
    monolayer_density_per_cm2: float,
    tooling_factor: float = 1.0,
) -> float:
    """Deposition rate at the sample (ML/min) from a QCM frequency change over a time.

    Sauerbrey gives the thickness on the crystal, divided by ``duration_s`` a rate in Å/s,
    which :func:`angstrom_per_s_to_ml_per_min` turns into ML/min with the tooling factor.
    ``frequency_shift_hz`` is f_after − f_before (negative); ``f0_hz`` the crystal's actual
    starting frequency (it drops as the crystal loads up).
    """
    duration = require_positive(duration_s, "duration_s")
    thickness = qcm_thickness_angstrom(frequency_shift_hz, density_g_cm3, f0_hz)
    return angstrom_per_s_to_ml_per_min(
        thickness / duration,
        density_g_cm3,
        molar_mass_g_per_mol,
        monolayer_density_per_cm2,
        tooling_factor,
    )


# --- rate calibration -----------------------------------------------------------------------

RateModel = Literal["constant", "proportional", "arrhenius"]
_MODELS = ("constant", "proportional", "arrhenius")


@dataclass(frozen=True)
class RateCalibration:
    """A fitted deposition-rate calibration of one source.

    * ``model``: "constant" (coverage = R·t), "proportional" (R = k·setting, e.g. an
      e-beam flux current) or "arrhenius" (ln R linear in 1/T, T the source temperature).
    * ``rate_ml_per_min`` and ``uncertainty_ml_per_min``: the fitted rate and its standard
      uncertainty (1σ, from the scatter of the points about the fit) at
      ``reference_setting`` — ``None`` for "constant", the mean setting for "proportional",
      the temperature 1/mean(1/T) at the centre of the data for "arrhenius".
    * ``residual_std``: standard deviation of the residuals with n − p degrees of freedom, in
      ML of coverage ("constant", "proportional") or in ln(rate), i.e. about the relative
      scatter ("arrhenius").
    * ``parameters`` and ``covariance``: constant (R,), proportional (k,) with R = k·setting,
      arrhenius (a, b) with ln R = a + b·(1/T − 1/T_ref).

    Use :meth:`predict` for the rate at another setting. A calibration read back from
    storage can be rebuilt with the constructor; it checks that the fields fit the model.
    """

    model: RateModel
    rate_ml_per_min: float
    uncertainty_ml_per_min: float
    n_points: int
    residual_std: float
    reference_setting: float | None
    parameters: tuple[float, ...]
    covariance: tuple[tuple[float, ...], ...]

    def __post_init__(self) -> None:
        if self.model not in _MODELS:
            raise ScienceInputError(
                f"model {self.model!r} is unknown; use one of {', '.join(_MODELS)}",
                argument="model",
            )
        size = 2 if self.model == "arrhenius" else 1
        if (
            len(self.parameters) != size
            or len(self.covariance) != size
            or any(len(row) != size for row in self.covariance)
        ):
            raise ScienceInputError(
                f"a {self.model} calibration has {size} parameter(s) and a {size}×{size} "
                "covariance",
                argument="parameters",
            )
        for value in (*self.parameters, *(v for row in self.covariance for v in row)):
            require_finite(value, "parameters")
        if self.model == "arrhenius":
            require_positive(self.reference_setting, "reference_setting")

    def predict(self, setting: float | None = None) -> tuple[float, float]:
        """(rate in ML/min, its standard uncertainty) at a source setting.

        "constant" ignores ``setting``. For "arrhenius" the uncertainty is propagated to
        first order through the exponential, u(R) = R·u(ln R); far outside the calibrated
        temperatures it is an extrapolation and grows accordingly.
        """
        if self.model == "constant":
            return self.parameters[0], math.sqrt(self.covariance[0][0])
        if setting is None:
            raise ScienceInputError(
                f"a {self.model} calibration needs the source setting to predict a rate",
                argument="setting",
            )
        if self.model == "proportional":
            value = require_non_negative(setting, "setting")
            return self.parameters[0] * value, value * math.sqrt(self.covariance[0][0])
        temperature = require_positive(setting, "setting")
        reference = require_positive(self.reference_setting, "reference_setting")
        x = 1.0 / temperature - 1.0 / reference
        a, b = self.parameters
        (var_a, cov_ab), (_, var_b) = self.covariance
        log_rate = a + b * x
        log_var = var_a + 2.0 * x * cov_ab + x * x * var_b
        try:
            rate = math.exp(log_rate)
        except OverflowError:
            raise ScienceInputError(
                f"setting {temperature!r} K is so far from the calibrated temperatures "
                f"(around {reference:.1f} K) that the predicted rate overflows",
                argument="setting",
            ) from None
        return rate, rate * math.sqrt(max(log_var, 0.0))

    def predict_coverage(
        self, duration_s: float, setting: float | None = None
    ) -> tuple[float, float]:
        """(coverage in ML, its standard uncertainty) after ``duration_s`` at a setting."""
        duration = require_non_negative(duration_s, "duration_s")
        rate, uncertainty = self.predict(setting)
        return rate * duration / SECONDS_PER_MINUTE, uncertainty * duration / SECONDS_PER_MINUTE

    @property
    def activation_energy_ev(self) -> float | None:
        """For "arrhenius": E_a = −b·k_B in eV (for an evaporation source, close to the
        sublimation enthalpy per atom); ``None`` for the other models."""
        if self.model != "arrhenius":
            return None
        return -self.parameters[1] * BOLTZMANN_J_PER_K / ELEMENTARY_CHARGE_C


def _points(
    points: Iterable[Sequence[float | None]], model: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    settings: list[float] = []
    minutes: list[float] = []
    coverages: list[float] = []
    for index, point in enumerate(points):
        try:
            setting, duration, coverage = point
        except (TypeError, ValueError):
            raise ScienceInputError(
                f"points[{index}] must be (setting, duration_s, coverage_ml), got {point!r}",
                argument="points",
            ) from None
        duration_value = require_positive(duration, f"points[{index}].duration_s")
        coverage_value = require_non_negative(coverage, f"points[{index}].coverage_ml")
        if model == "constant":
            setting_value = (
                math.nan if setting is None else require_finite(setting, f"points[{index}].setting")
            )
        elif model == "proportional":
            setting_value = require_positive(setting, f"points[{index}].setting")
        else:
            setting_value = require_positive(setting, f"points[{index}].setting (temperature_k)")
            if coverage_value == 0.0:
                raise ScienceInputError(
                    f"points[{index}].coverage_ml is 0: an Arrhenius fit takes ln(rate), so "
                    "every point needs some coverage",
                    argument="points",
                )
        settings.append(setting_value)
        minutes.append(duration_value / SECONDS_PER_MINUTE)
        coverages.append(coverage_value)
    return np.asarray(settings), np.asarray(minutes), np.asarray(coverages)


def _fit_through_origin(x: np.ndarray, y: np.ndarray) -> tuple[float, float, float]:
    """y = k·x by least squares: (k, variance of k, residual std), n − 1 degrees of freedom."""
    sxx = float(np.dot(x, x))
    slope = float(np.dot(x, y)) / sxx
    residuals = y - slope * x
    variance_of_residuals = float(np.dot(residuals, residuals)) / (len(x) - 1)
    return slope, variance_of_residuals / sxx, math.sqrt(variance_of_residuals)


def fit_rate_calibration(
    points: Iterable[Sequence[float | None]], model: RateModel = "constant"
) -> RateCalibration:
    """Least-squares fit of a source's deposition rate from measured coverages.

    ``points``: (setting, duration_s, coverage_ml) per calibration deposit, the coverage
    measured independently (STM island area, QCM, XPS ...). The setting is ignored by
    "constant" (``None`` is fine), is a flux current or any quantity the rate is
    proportional to for "proportional", and the source temperature in K for "arrhenius".
    Models:

    * "constant": coverage = R·t through the origin; R in ML/min with the standard
      uncertainty s/√Σt² (s the residual std, n − 1 degrees of freedom). ≥ 2 points.
    * "proportional": coverage = k·setting·t (a flux monitor current, say); ≥ 2 points.
    * "arrhenius": ln(coverage/t) = a + b/T with T = setting in K; ordinary least squares
      on the log rates, parameters centred on 1/T_ref = mean(1/T); ≥ 3 points at ≥ 2
      temperatures.

    The points are weighted equally (no per-point uncertainties); the fitted uncertainty
    therefore says how well the points agree with the model, not how well each was measured.
    """
    if model not in _MODELS:
        raise ScienceInputError(
            f"model {model!r} is unknown; use one of {', '.join(_MODELS)}", argument="model"
        )
    settings, minutes, coverages = _points(points, model)
    n = len(minutes)
    needed = 3 if model == "arrhenius" else 2
    if n < needed:
        raise ScienceInputError(
            f"a {model} fit needs at least {needed} points to estimate its uncertainty, got {n}",
            argument="points",
        )
    if model == "constant":
        rate, variance, residual_std = _fit_through_origin(minutes, coverages)
        return RateCalibration(
            "constant", rate, math.sqrt(variance), n, residual_std, None, (rate,), ((variance,),)
        )
    if model == "proportional":
        k, variance, residual_std = _fit_through_origin(settings * minutes, coverages)
        reference = float(np.mean(settings))
        return RateCalibration(
            "proportional",
            k * reference,
            math.sqrt(variance) * reference,
            n,
            residual_std,
            reference,
            (k,),
            ((variance,),),
        )
    inverse_t = 1.0 / settings
    if float(np.ptp(inverse_t)) == 0.0:
        raise ScienceInputError(
            "an Arrhenius fit needs points at two or more source temperatures",
            argument="points",
        )
    reference = 1.0 / float(np.mean(inverse_t))
    x = inverse_t - 1.0 / reference
    y = np.log(coverages / minutes)
    design = np.column_stack([np.ones_like(x), x])
    (a, b), *_ = np.linalg.lstsq(design, y, rcond=None)
    residuals = y - (a + b * x)
    variance_of_residuals = float(np.dot(residuals, residuals)) / (n - 2)
    covariance = variance_of_residuals * np.linalg.inv(design.T @ design)
    rate = math.exp(float(a))
    return RateCalibration(
        "arrhenius",
        rate,
        rate * math.sqrt(float(covariance[0, 0])),
        n,
        math.sqrt(variance_of_residuals),
        reference,
        (float(a), float(b)),
        tuple(tuple(float(v) for v in row) for row in covariance),
    )
