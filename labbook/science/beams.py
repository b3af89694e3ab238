"""Ion beams: charge, fluence and flux of a sputter dose.

Φ = I·t / ((1 + γ) · q · e · A)

* ``current_a`` is the measured current in A, given as a magnitude (the sign an ammeter
  shows depends on how it is wired). In most preparation chambers it is the sample drain
  current, which includes the secondary electrons the ions knock out; each leaving
  electron adds one e to the drain current, so the ion current is I / (1 + γ) with γ the
  secondary-electron yield per ion (γ ≈ 0.1 for keV Ar⁺ on metals, from memory;
  REFERENCES.md §4). The default γ = 0 gives the uncorrected value most logbooks quote.
* ``charge_state`` q: each ion carries q·e, so a current of multiply charged ions brings
  fewer ions. The default 1 is the usual Ar⁺/Ne⁺ sputter gun.
* ``beam_area_cm2`` is the area the current is spread over (the sample, or the beam spot
  if the sample is larger than the beam); the fluence is an average over it.
"""

from __future__ import annotations

from numbers import Integral

from labbook.science.constants import ELEMENTARY_CHARGE_C
from labbook.science.errors import (
    ScienceInputError,
    require_non_negative,
    require_positive,
)


def _check_charge_state(charge_state: int) -> int:
    if isinstance(charge_state, bool) or not isinstance(charge_state, Integral):
        raise ScienceInputError(
            f"charge_state must be a whole number of elementary charges, got {charge_state!r}",
            argument="charge_state",
        )
    if charge_state < 1:
        raise ScienceInputError(
            f"charge_state must be at least 1, got {charge_state!r}", argument="charge_state"
        )
    return int(charge_state)


def beam_charge_c(current_a: float, duration_s: float) -> float:
    """Charge delivered, Q = I·t, in coulomb (1 µA for 10 min is 0.600 mC)."""
    current = require_non_negative(current_a, "current_a")
    duration = require_non_negative(duration_s, "duration_s")
    return current * duration


def ion_flux_per_cm2_s(
    current_a: float,
    beam_area_cm2: float,
    charge_state: int = 1,
    secondary_electron_yield: float = 0.0,
) -> float:
    """Ions per cm² per second: I / ((1 + γ) q e A). 1 µA on 1 cm² is 6.2415e12 cm⁻² s⁻¹."""
    current = require_non_negative(current_a, "current_a")
    area = require_positive(beam_area_cm2, "beam_area_cm2")
    charge = _check_charge_state(charge_state)
    gamma = require_non_negative(secondary_electron_yield, "secondary_electron_yield")
    ion_current_a = current / (1.0 + gamma)
    return ion_current_a / (charge * ELEMENTARY_CHARGE_C * area)


def ion_fluence_per_cm2(
    current_a: float,
    duration_s: float,
    beam_area_cm2: float,
    charge_state: int = 1,
    secondary_electron_yield: float = 0.0,
) -> float:
    """Ions per cm² delivered in a sputter step: I·t / ((1 + γ) q e A).

    1 µA for 10 min on 1 cm² (q = 1, γ = 0) is 3.745e15 ions/cm². See the module docstring
    for what the current, the charge state and γ mean.
    """
    duration = require_non_negative(duration_s, "duration_s")
    return (
        ion_flux_per_cm2_s(current_a, beam_area_cm2, charge_state, secondary_electron_yield)
        * duration
    )


def fluence_in_monolayers(fluence_per_cm2: float, monolayer_density_per_cm2: float) -> float:
    """A fluence expressed in ions per surface atom ("ML equivalents").

    3.745e15 ions/cm² on Cu(111) (1.767e15 atoms/cm²) is 2.12 ML equivalents.
    """
    fluence = require_non_negative(fluence_per_cm2, "fluence_per_cm2")
    density = require_positive(monolayer_density_per_cm2, "monolayer_density_per_cm2")
    return fluence / density
