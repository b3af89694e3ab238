"""Vacuum: ion-gauge gas correction, Langmuir exposure, Hertz–Knudsen impingement, ranges.

Conventions:

* Pressures in the trade unit mbar unless the argument name says otherwise
  (``pressure_pa``); 1 mbar = 100 Pa, 1 Torr = 101325/760 Pa (exact).
* Hot-cathode (Bayard–Alpert) gauges read "N2-equivalent" pressure. A gas with relative
  sensitivity S (ion current per unit pressure relative to N2) makes the gauge read S times
  its true pressure, so ``true = indicated / S`` for a gauge calibrated for N2.
* Exposure in langmuir (1 L = 1e-6 Torr·s exactly) is computed from whatever pressure the
  caller gives: pass the gauge reading for "exposure as read" and :func:`true_pressure`
  for the gas-corrected exposure.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

from labbook.science.constants import (
    AVOGADRO_PER_MOL,
    BOLTZMANN_J_PER_K,
    LANGMUIR_MBAR_S,
    MBAR_PA,
)
from labbook.science.errors import (
    OutOfRangeError,
    ScienceInputError,
    UnknownNameError,
    finite_result,
    require_non_negative,
    require_positive,
)

# --- gas names ------------------------------------------------------------------------------

_SUBSCRIPTS = str.maketrans("₀₁₂₃₄₅₆₇₈₉", "0123456789")

# English names people type into a form, mapped to the formula the tables use.
_GAS_NAMES: Mapping[str, str] = MappingProxyType(
    {
        "nitrogen": "N2",
        "carbon monoxide": "CO",
        "oxygen": "O2",
        "hydrogen": "H2",
        "deuterium": "D2",
        "water": "H2O",
        "water vapour": "H2O",
        "water vapor": "H2O",
        "argon": "Ar",
        "helium": "He",
        "neon": "Ne",
        "krypton": "Kr",
        "xenon": "Xe",
        "carbon dioxide": "CO2",
        "nitric oxide": "NO",
        "nitrogen monoxide": "NO",
        "ammonia": "NH3",
        "ethylene": "C2H4",
        "ethene": "C2H4",
    }
)

# --- molar masses ---------------------------------------------------------------------------

#: Standard atomic weights (g/mol), IUPAC/CIAAW. For H, C, N, O (and Ar, since 2017) the
#: standard atomic weight is an interval; these are the CIAAW *conventional* values for
#: ordinary samples (H 1.008, C 12.011, N 14.007, O 15.999, Ar 39.95). He, Ne, Kr, Xe are
#: the single standard values. D is the atomic mass of ²H (2.01410177812 u, AME2016 /
#: CODATA 2018), not a standard atomic weight. All typed in from memory of those tables;
#: the tests compare the molecular masses with CoolProp's to 1e-4.
STANDARD_ATOMIC_WEIGHTS_G_PER_MOL: Mapping[str, float] = MappingProxyType(
    {
        "H": 1.008,
        "D": 2.01410177812,
        "He": 4.002602,
        "C": 12.011,
        "N": 14.007,
        "O": 15.999,
        "Ne": 20.1797,
        "Ar": 39.95,
        "Kr": 83.798,
        "Xe": 131.293,
    }
)

_ELEMENT_COUNT = re.compile(r"([A-Z][a-z]?)(\d*)")


def formula_molar_mass_g_per_mol(formula: str) -> float:
    """Molar mass (g/mol) of a simple formula such as "C2H4", from the atomic weights above.

    Only plain formulas (element symbols with counts, no brackets or charges) made of the
    elements of :data:`STANDARD_ATOMIC_WEIGHTS_G_PER_MOL` are accepted.
    """
    text = formula.strip().translate(_SUBSCRIPTS)
    pieces = _ELEMENT_COUNT.findall(text)
    if not text or "".join(symbol + count for symbol, count in pieces) != text:
        raise UnknownNameError(
            f"formula {formula!r} is not a plain chemical formula such as 'C2H4'",
            argument="formula",
        )
    total = 0.0
    for symbol, count in pieces:
        try:
            weight = STANDARD_ATOMIC_WEIGHTS_G_PER_MOL[symbol]
        except KeyError:
            raise UnknownNameError(
                f"formula {formula!r}: no atomic weight for element {symbol!r} "
                f"(known: {', '.join(STANDARD_ATOMIC_WEIGHTS_G_PER_MOL)})",
                argument="formula",
            ) from None
        number = int(count) if count else 1
        if number == 0:
            raise UnknownNameError(f"formula {formula!r} has a zero count", argument="formula")
        total += number * weight
    return total


#: Molar masses (g/mol) of the gases dosed or met in UHV, computed from
#: :data:`STANDARD_ATOMIC_WEIGHTS_G_PER_MOL`.
MOLAR_MASS_G_PER_MOL: Mapping[str, float] = MappingProxyType(
    {
        gas: formula_molar_mass_g_per_mol(gas)
        for gas in ("N2", "CO", "O2", "H2", "H2O", "Ar", "He", "Ne", "Kr", "Xe")
        + ("CO2", "D2", "NO", "NH3", "C2H4")
    }
)


def normalize_gas(gas: str, *, known: Mapping[str, object] | None = None) -> str:
    """Return the formula the tables use for ``gas`` ("argon", "ar", "N₂" → "Ar", "Ar", "N2").

    A name in ``known`` (or the molar-mass table) matches case-insensitively, since formulas
    of the common gases stay distinct when upper-cased; anything else is returned stripped,
    with subscript digits made plain, so user tables can add other gases.
    """
    if not isinstance(gas, str) or not gas.strip():
        raise UnknownNameError(f"gas must be a non-empty name, got {gas!r}", argument="gas")
    text = gas.strip().translate(_SUBSCRIPTS)
    by_name = _GAS_NAMES.get(text.lower())
    if by_name is not None:
        return by_name
    candidates = known if known is not None else MOLAR_MASS_G_PER_MOL
    for formula in candidates:
        if formula.upper() == text.upper():
            return formula
    return text


def molar_mass_kg_per_mol(gas: str) -> float:
    """Molar mass of a gas in kg/mol, from the table or, failing that, its formula."""
    name = normalize_gas(gas)
    grams = MOLAR_MASS_G_PER_MOL.get(name)
    if grams is None:
        try:
            grams = formula_molar_mass_g_per_mol(name)
        except UnknownNameError:
            raise UnknownNameError(
                f"gas {gas!r} is unknown: name one of {', '.join(MOLAR_MASS_G_PER_MOL)} "
                "or give a formula of H, D, He, C, N, O, Ne, Ar, Kr, Xe",
                argument="gas",
            ) from None
    return grams * 1e-3


# --- ion-gauge sensitivities ----------------------------------------------------------------

CRC_REDHEAD_SOURCE = (
    "CRC Handbook of Chemistry and Physics, 'Relative sensitivity of Bayard-Alpert "
    "ionization gauges to various gases' (P. Redhead): S/S(N2), mean of 12 experimenters, "
    "±15 % gauge to gauge"
)


@dataclass(frozen=True, eq=False)
class SensitivityTable(Mapping[str, float]):
    """Ion-gauge relative sensitivities S (relative to N2) by gas, with the table's source.

    Read-only; look-ups accept the same spellings as :func:`normalize_gas`. Use
    :meth:`with_overrides` for a gauge whose maker gives other factors.
    """

    factors: Mapping[str, float]
    source: str
    _data: Mapping[str, float] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        data: dict[str, float] = {}
        for gas, value in self.factors.items():
            name = normalize_gas(gas)
            data[name] = require_positive(value, f"sensitivity of {name}")
        # Keep a private read-only copy: the caller's dict may change later.
        object.__setattr__(self, "_data", MappingProxyType(data))
        object.__setattr__(self, "factors", self._data)

    def __getitem__(self, gas: str) -> float:
        name = normalize_gas(gas, known=self._data)
        try:
            return self._data[name]
        except KeyError:
            raise UnknownNameError(
                f"no ion-gauge sensitivity for gas {gas!r} in the table ({self.source}); "
                f"known: {', '.join(self._data)}; pass sensitivities={{{name!r}: S}}",
                argument="gas",
            ) from None

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __contains__(self, gas: object) -> bool:
        if not isinstance(gas, str) or not gas.strip():
            return False
        return normalize_gas(gas, known=self._data) in self._data

    def with_overrides(
        self, overrides: Mapping[str, float], *, source: str | None = None
    ) -> SensitivityTable:
        """A new table with ``overrides`` replacing or adding gases; the source says so."""
        merged = dict(self._data)
        for gas, value in overrides.items():
            merged[normalize_gas(gas, known=self._data)] = value
        note = source or f"{self.source}; overridden for {', '.join(overrides)}"
        return SensitivityTable(merged, note)


#: The default table (REFERENCES.md §3, CRC column).
CRC_SENSITIVITIES = SensitivityTable(
    {
        "He": 0.18,
        "Ne": 0.31,
        "Ar": 1.4,
        "Kr": 1.9,
        "Xe": 2.7,
        "H2": 0.43,
        "O2": 0.96,
        "CO": 1.0,
        "CO2": 1.4,
        "H2O": 0.93,
        "N2": 1.0,
    },
    CRC_REDHEAD_SOURCE,
)


def _table(sensitivities: Mapping[str, float] | None) -> SensitivityTable:
    if sensitivities is None:
        return CRC_SENSITIVITIES
    if isinstance(sensitivities, SensitivityTable):
        return sensitivities
    # A plain mapping is a set of overrides on top of the default table.
    return CRC_SENSITIVITIES.with_overrides(sensitivities)


def gas_correction_factor(
    gas: str, gauge_gas: str = "N2", sensitivities: Mapping[str, float] | None = None
) -> float:
    """Factor C with true pressure = C × indicated pressure: C = S(gauge_gas) / S(gas).

    ``gauge_gas`` is the gas the gauge is calibrated for (N2 for nearly every gauge).
    ``sensitivities``: a :class:`SensitivityTable`, or a plain mapping of overrides applied
    on top of :data:`CRC_SENSITIVITIES`, or ``None`` for the CRC table.
    """
    table = _table(sensitivities)
    return table[gauge_gas] / table[gas]


def true_pressure(
    indicated: float,
    gas: str,
    gauge_gas: str = "N2",
    sensitivities: Mapping[str, float] | None = None,
) -> float:
    """True pressure of ``gas`` from an ion-gauge reading, in the unit of ``indicated``.

    true = indicated × S(gauge_gas) / S(gas); with the CRC table, 1.0e-6 mbar read for argon
    is 7.14e-7 mbar of argon. The correction assumes the gas is the only one present.
    """
    reading = require_non_negative(indicated, "indicated")
    return reading * gas_correction_factor(gas, gauge_gas, sensitivities)


# --- exposure and impingement ---------------------------------------------------------------


def exposure_langmuir(pressure_mbar: float, duration_s: float) -> float:
    """Exposure p·t in langmuir (1 L = 1e-6 Torr·s) for a pressure in mbar held for a time.

    2.5e-6 mbar for 53 s is 99.4 L; 1e-6 mbar for 100 s is 75.0 L.
    """
    pressure = require_non_negative(pressure_mbar, "pressure_mbar")
    duration = require_non_negative(duration_s, "duration_s")
    return finite_result(
        pressure * duration / LANGMUIR_MBAR_S, "exposure", "pressure_mbar", "duration_s"
    )


def hertz_knudsen_flux(
    pressure_pa: float, molar_mass_kg_per_mol: float, temperature_k: float
) -> float:
    """Impingement rate Z = p / √(2π m k_B T) in m⁻² s⁻¹ (kinetic gas theory).

    ``m`` is the mass of one molecule, M / N_A. The gas is taken as ideal and in equilibrium
    at ``temperature_k`` (the chamber wall temperature, not the sample's).
    """
    pressure = require_non_negative(pressure_pa, "pressure_pa")
    molar_mass = require_positive(molar_mass_kg_per_mol, "molar_mass_kg_per_mol")
    temperature = require_positive(temperature_k, "temperature_k")
    molecule_mass_kg = molar_mass / AVOGADRO_PER_MOL
    return pressure / math.sqrt(2.0 * math.pi * molecule_mass_kg * BOLTZMANN_J_PER_K * temperature)


def hertz_knudsen_flux_per_cm2_s(
    pressure_pa: float, molar_mass_kg_per_mol: float, temperature_k: float
) -> float:
    """:func:`hertz_knudsen_flux` in cm⁻² s⁻¹ (1 m² = 1e4 cm²)."""
    return hertz_knudsen_flux(pressure_pa, molar_mass_kg_per_mol, temperature_k) / 1e4


def impingement_rate_per_cm2_s(
    pressure_mbar: float, gas: str, temperature_k: float = 295.0
) -> float:
    """Molecules striking 1 cm² per second (Hertz–Knudsen) for a gas at a pressure in mbar.

    Pass the *true* pressure of the gas (see :func:`true_pressure`), not the gauge reading.
    N2 at 1e-6 mbar and 300 K: 2.874e14 cm⁻² s⁻¹.
    """
    pressure = require_non_negative(pressure_mbar, "pressure_mbar")
    return hertz_knudsen_flux_per_cm2_s(
        pressure * MBAR_PA, molar_mass_kg_per_mol(gas), temperature_k
    )


def impingement_per_cm2(
    pressure_mbar: float, duration_s: float, gas: str, temperature_k: float = 295.0
) -> float:
    """Molecules striking 1 cm² during a dose: Hertz–Knudsen rate × duration.

    ``pressure_mbar`` is the true pressure of the gas; ``temperature_k`` the gas (chamber)
    temperature, 295 K by default (room temperature, common practice). How many stick
    depends on the sticking coefficient, which this does not include.
    """
    duration = require_non_negative(duration_s, "duration_s")
    return impingement_rate_per_cm2_s(pressure_mbar, gas, temperature_k) * duration


# --- vacuum ranges --------------------------------------------------------------------------


@dataclass(frozen=True)
class VacuumRange:
    """A named range of vacuum under a stated convention.

    ``lower_mbar`` is inclusive, ``upper_mbar`` exclusive; ``None`` means open-ended.
    """

    name: str
    label: str
    convention: str
    lower_mbar: float | None
    upper_mbar: float | None


ISO_3529_2019 = "ISO 3529-1:2019"
ISO_3529_1981 = "ISO 3529-1:1981"

_LABELS = {
    "low": "low (rough) vacuum",
    "medium": "medium (fine) vacuum",
    "high": "high vacuum (HV)",
    "ultra-high": "ultra-high vacuum (UHV)",
    "extreme-high": "extreme-high vacuum (XHV)",
}

# Lower bounds in mbar, highest range first. ISO 3529-1:2019 in Pa: low ≥ 100, medium
# 0.1–100, high 1e-6–0.1, UHV 1e-9–1e-6, XHV < 1e-9 (the 2019 numbers are from memory,
# REFERENCES.md §5, MEM). ISO 3529-1:1981 (= DIN 28400-1 for these four ranges): low
# ≥ 100 Pa, medium 0.1–100, high 1e-5–0.1, UHV < 1e-5; it defines no XHV (SRCH).
# Kept in mbar so that the boundaries are exact decimal literals.
_RANGES_MBAR: Mapping[str, tuple[tuple[str, float | None], ...]] = MappingProxyType(
    {
        ISO_3529_2019: (
            ("low", 1.0),
            ("medium", 1e-3),
            ("high", 1e-8),
            ("ultra-high", 1e-11),
            ("extreme-high", None),
        ),
        ISO_3529_1981: (
            ("low", 1.0),
            ("medium", 1e-3),
            ("high", 1e-7),
            ("ultra-high", None),
        ),
    }
)
_CONVENTION_ALIASES = {"DIN 28400-1": ISO_3529_1981}

#: Above the highest prevailing atmospheric pressure (110 kPa, ISO 3529-1:2019 note) a
#: reading is not a vacuum at all.
ATMOSPHERE_MAX_MBAR = 1100.0


def vacuum_range(pressure_mbar: float, convention: str = ISO_3529_2019) -> VacuumRange:
    """The named vacuum range a pressure (mbar) falls in, under ``convention``.

    Conventions: "ISO 3529-1:2019" (default; low, medium, high, ultra-high, extreme-high)
    and "ISO 3529-1:1981" (alias "DIN 28400-1"; no extreme-high range, UHV is open-ended).
    A pressure at a boundary belongs to the range above it (1e-8 mbar is high vacuum under
    the 2019 convention).
    """
    pressure = require_positive(pressure_mbar, "pressure_mbar")
    key = _CONVENTION_ALIASES.get(convention, convention)
    ranges = _RANGES_MBAR.get(key)
    if ranges is None:
        raise UnknownNameError(
            f"convention {convention!r} is unknown; use one of "
            f"{', '.join([*_RANGES_MBAR, *_CONVENTION_ALIASES])}",
            argument="convention",
        )
    if pressure > ATMOSPHERE_MAX_MBAR:
        raise OutOfRangeError(
            f"pressure_mbar {pressure!r} is above atmospheric pressure "
            f"({ATMOSPHERE_MAX_MBAR} mbar at most): not a vacuum",
            argument="pressure_mbar",
        )
    upper: float | None = None
    for name, lower in ranges:
        if lower is None or pressure >= lower:
            return VacuumRange(name, _LABELS[name], key, lower, upper)
        upper = lower
    raise ScienceInputError(  # pragma: no cover - the last range is open-ended
        f"pressure_mbar {pressure!r} fits no range", argument="pressure_mbar"
    )
