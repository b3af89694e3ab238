"""Thermocouples: EMF ↔ temperature for types B, E, J, K, N, R, S, T, with cold-junction
compensation.

The reference functions are those of NIST Monograph 175 (Burns et al., 1993) on the ITS-90,
adopted by IEC 60584-1 and ASTM E230: E(t90) in mV with the reference junction at 0 °C,

    E = Σ c_i t^i                                   (t in °C)
    E = Σ c_i t^i + a0 · exp(a1 · (t − a2)²)        (type K above 0 °C; the extra term
                                                     describes the magnetic ordering in
                                                     the alumel leg)

Coefficients typed in from the NIST ITS-90 Thermocouple Database (SRD 60) coefficient
file ("allcoeff.tab").

The inverse is a bisection on the forward function, exact to it (to 1e-9 °C) rather than
NIST's approximate inverse polynomials (which agree within ±0.06 °C). Type B is not
single-valued below about 42 °C (its EMF has a minimum near 21 °C and stays below 3 µV up
to 50 °C), so it is inverted only from 50 °C.

Cold-junction compensation: a meter with its terminals (the cold junction) at t_cj reads
E(t) − E(t_cj), so t = E⁻¹(E_read + E(t_cj)).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

from labbook.science.constants import ZERO_CELSIUS_K
from labbook.science.errors import OutOfRangeError, UnknownNameError, require_finite


@dataclass(frozen=True)
class _Piece:
    t_min_c: float
    t_max_c: float
    coefficients: tuple[float, ...]  # c0, c1, ... in mV/°C^i


@dataclass(frozen=True)
class ThermocoupleType:
    """A letter-designated thermocouple type with its NIST reference function."""

    letter: str
    composition: str
    pieces: tuple[_Piece, ...]
    #: (a0 mV, a1 1/°C², a2 °C) of the type K exponential term above 0 °C, else None.
    exponential: tuple[float, float, float] | None = None
    #: Lowest temperature (°C) from which the EMF is single-valued and inverted.
    inverse_min_c: float | None = None

    @property
    def t_min_c(self) -> float:
        return self.pieces[0].t_min_c

    @property
    def t_max_c(self) -> float:
        return self.pieces[-1].t_max_c

    @property
    def inverse_range_c(self) -> tuple[float, float]:
        low = self.t_min_c if self.inverse_min_c is None else self.inverse_min_c
        return low, self.t_max_c


# Compositions (positive leg / negative leg) as in IEC 60584-1, from memory.
THERMOCOUPLES: Mapping[str, ThermocoupleType] = MappingProxyType(
    {
        "B": ThermocoupleType(
            "B",
            "Pt-30%Rh / Pt-6%Rh",
            (
                _Piece(
                    0.0,
                    630.615,
                    (
                        0.000000000000e00,
                        -0.246508183460e-03,
                        0.590404211710e-05,
                        -0.132579316360e-08,
                        0.156682919010e-11,
                        -0.169445292400e-14,
                        0.629903470940e-18,
                    ),
                ),
                _Piece(
                    630.615,
                    1820.0,
                    (
                        -0.389381686210e01,
                        0.285717474700e-01,
                        -0.848851047850e-04,
                        0.157852801640e-06,
                        -0.168353448640e-09,
                        0.111097940130e-12,
                        -0.445154310330e-16,
                        0.989756408210e-20,
                        -0.937913302890e-24,
                    ),
                ),
            ),
            inverse_min_c=50.0,
        ),
        "E": ThermocoupleType(
            "E",
            "Ni-Cr / Cu-Ni",
            (
                _Piece(
                    -270.0,
                    0.0,
                    (
                        0.000000000000e00,
                        0.586655087080e-01,
                        0.454109771240e-04,
                        -0.779980486860e-06,
                        -0.258001608430e-07,
                        -0.594525830570e-09,
                        -0.932140586670e-11,
                        -0.102876055340e-12,
                        -0.803701236210e-15,
                        -0.439794973910e-17,
                        -0.164147763550e-19,
                        -0.396736195160e-22,
                        -0.558273287210e-25,
                        -0.346578420130e-28,
                    ),
                ),
                _Piece(
                    0.0,
                    1000.0,
                    (
                        0.000000000000e00,
                        0.586655087100e-01,
                        0.450322755820e-04,
                        0.289084072120e-07,
                        -0.330568966520e-09,
                        0.650244032700e-12,
                        -0.191974955040e-15,
                        -0.125366004970e-17,
                        0.214892175690e-20,
                        -0.143880417820e-23,
                        0.359608994810e-27,
                    ),
                ),
            ),
        ),
        "J": ThermocoupleType(
            "J",
            "Fe / Cu-Ni",
            (
                _Piece(
                    -210.0,
                    760.0,
                    (
                        0.000000000000e00,
                        0.503811878150e-01,
                        0.304758369300e-04,
                        -0.856810657200e-07,
                        0.132281952950e-09,
                        -0.170529583370e-12,
                        0.209480906970e-15,
                        -0.125383953360e-18,
                        0.156317256970e-22,
                    ),
                ),
                _Piece(
                    760.0,
                    1200.0,
                    (
                        0.296456256810e03,
                        -0.149761277860e01,
                        0.317871039240e-02,
                        -0.318476867010e-05,
                        0.157208190040e-08,
                        -0.306913690560e-12,
                    ),
                ),
            ),
        ),
        "K": ThermocoupleType(
            "K",
            "Ni-Cr / Ni-Al",
            (
                _Piece(
                    -270.0,
                    0.0,
                    (
                        0.000000000000e00,
                        0.394501280250e-01,
                        0.236223735980e-04,
                        -0.328589067840e-06,
                        -0.499048287770e-08,
                        -0.675090591730e-10,
                        -0.574103274280e-12,
                        -0.310888728940e-14,
                        -0.104516093650e-16,
                        -0.198892668780e-19,
                        -0.163226974860e-22,
                    ),
                ),
                _Piece(
                    0.0,
                    1372.0,
                    (
                        -0.176004136860e-01,
                        0.389212049750e-01,
                        0.185587700320e-04,
                        -0.994575928740e-07,
                        0.318409457190e-09,
                        -0.560728448890e-12,
                        0.560750590590e-15,
                        -0.320207200030e-18,
                        0.971511471520e-22,
                        -0.121047212750e-25,
                    ),
                ),
            ),
            exponential=(0.118597600000e00, -0.118343200000e-03, 0.126968600000e03),
        ),
        "N": ThermocoupleType(
            "N",
            "Ni-Cr-Si / Ni-Si",
            (
                _Piece(
                    -270.0,
                    0.0,
                    (
                        0.000000000000e00,
                        0.261591059620e-01,
                        0.109574842280e-04,
                        -0.938411115540e-07,
                        -0.464120397590e-10,
                        -0.263033577160e-11,
                        -0.226534380030e-13,
                        -0.760893007910e-16,
                        -0.934196678350e-19,
                    ),
                ),
                _Piece(
                    0.0,
                    1300.0,
                    (
                        0.000000000000e00,
                        0.259293946010e-01,
                        0.157101418800e-04,
                        0.438256272370e-07,
                        -0.252611697940e-09,
                        0.643118193390e-12,
                        -0.100634715190e-14,
                        0.997453389920e-18,
                        -0.608632456070e-21,
                        0.208492293390e-24,
                        -0.306821961510e-28,
                    ),
                ),
            ),
        ),
        "R": ThermocoupleType(
            "R",
            "Pt-13%Rh / Pt",
            (
                _Piece(
                    -50.0,
                    1064.18,
                    (
                        0.000000000000e00,
                        0.528961729765e-02,
                        0.139166589782e-04,
                        -0.238855693017e-07,
                        0.356916001063e-10,
                        -0.462347666298e-13,
                        0.500777441034e-16,
                        -0.373105886191e-19,
                        0.157716482367e-22,
                        -0.281038625251e-26,
                    ),
                ),
                _Piece(
                    1064.18,
                    1664.5,
                    (
                        0.295157925316e01,
                        -0.252061251332e-02,
                        0.159564501865e-04,
                        -0.764085947576e-08,
                        0.205305291024e-11,
                        -0.293359668173e-15,
                    ),
                ),
                _Piece(
                    1664.5,
                    1768.1,
                    (
                        0.152232118209e03,
                        -0.268819888545e00,
                        0.171280280471e-03,
                        -0.345895706453e-07,
                        -0.934633971046e-14,
                    ),
                ),
            ),
        ),
        "S": ThermocoupleType(
            "S",
            "Pt-10%Rh / Pt",
            (
                _Piece(
                    -50.0,
                    1064.18,
                    (
                        0.000000000000e00,
                        0.540313308631e-02,
                        0.125934289740e-04,
                        -0.232477968689e-07,
                        0.322028823036e-10,
                        -0.331465196389e-13,
                        0.255744251786e-16,
                        -0.125068871393e-19,
                        0.271443176145e-23,
                    ),
                ),
                _Piece(
                    1064.18,
                    1664.5,
                    (
                        0.132900444085e01,
                        0.334509311344e-02,
                        0.654805192818e-05,
                        -0.164856259209e-08,
                        0.129989605174e-13,
                    ),
                ),
                _Piece(
                    1664.5,
                    1768.1,
                    (
                        0.146628232636e03,
                        -0.258430516752e00,
                        0.163693574641e-03,
                        -0.330439046987e-07,
                        -0.943223690612e-14,
                    ),
                ),
            ),
        ),
        "T": ThermocoupleType(
            "T",
            "Cu / Cu-Ni",
            (
                _Piece(
                    -270.0,
                    0.0,
                    (
                        0.000000000000e00,
                        0.387481063640e-01,
                        0.441944343470e-04,
                        0.118443231050e-06,
                        0.200329735540e-07,
                        0.901380195590e-09,
                        0.226511565930e-10,
                        0.360711542050e-12,
                        0.384939398830e-14,
                        0.282135219250e-16,
                        0.142515947790e-18,
                        0.487686622860e-21,
                        0.107955392700e-23,
                        0.139450270620e-26,
                        0.797951539270e-30,
                    ),
                ),
                _Piece(
                    0.0,
                    400.0,
                    (
                        0.000000000000e00,
                        0.387481063640e-01,
                        0.332922278800e-04,
                        0.206182434040e-06,
                        -0.218822568460e-08,
                        0.109968809280e-10,
                        -0.308157587720e-13,
                        0.454791352900e-16,
                        -0.275129016730e-19,
                    ),
                ),
            ),
        ),
    }
)

#: The letters of the types implemented.
THERMOCOUPLE_TYPES: tuple[str, ...] = tuple(THERMOCOUPLES)


def thermocouple(tc_type: str) -> ThermocoupleType:
    """The :class:`ThermocoupleType` for "K", "k", "type K", "Type-K" ..."""
    if isinstance(tc_type, str):
        letter = tc_type.strip().upper().removeprefix("TYPE").strip(" -_")
        found = THERMOCOUPLES.get(letter)
        if found is not None:
            return found
    raise UnknownNameError(
        f"tc_type {tc_type!r} is not a thermocouple type; use one of "
        f"{', '.join(THERMOCOUPLE_TYPES)}",
        argument="tc_type",
    )


def thermocouple_range_c(tc_type: str) -> tuple[float, float]:
    """(lowest, highest) temperature in °C of the type's reference function."""
    found = thermocouple(tc_type)
    return found.t_min_c, found.t_max_c


def _evaluate(found: ThermocoupleType, t_c: float) -> float:
    for piece in found.pieces:
        if t_c <= piece.t_max_c:
            break
    emf = 0.0
    for c in reversed(piece.coefficients):  # Horner's scheme
        emf = emf * t_c + c
    if found.exponential is not None and piece is found.pieces[-1]:
        a0, a1, a2 = found.exponential
        emf += a0 * math.exp(a1 * (t_c - a2) ** 2)
    return emf


# K → °C subtraction can land a range end a few ulp outside it (1273.15 K − 273.15 =
# 1000.0000000000001 °C); within this margin the value is taken as the range end.
_T_ROUNDING_C = 1e-9


def _check_range(found: ThermocoupleType, t_c: float, argument: str) -> float:
    """Return ``t_c`` clamped to the type's range if within rounding of it; raise if outside."""
    low, high = found.t_min_c, found.t_max_c
    if not low - _T_ROUNDING_C <= t_c <= high + _T_ROUNDING_C:
        raise OutOfRangeError(
            f"{argument} = {t_c!r} °C is outside the type {found.letter} reference function "
            f"({low} to {high} °C)",
            argument=argument,
        )
    return min(max(t_c, low), high)


# Rounding noise of the high-order polynomials near their flat low ends is ~1e-12 mV; an
# EMF within 1e-9 mV (1 pV) outside a range end is taken as the end itself.
_EMF_ROUNDING_MV = 1e-9


def reference_emf_mv(temperature_c: float, tc_type: str) -> float:
    """EMF in mV at ``temperature_c`` (°C, ITS-90) with the reference junction at 0 °C."""
    found = thermocouple(tc_type)
    t_c = require_finite(temperature_c, "temperature_c")
    t_c = _check_range(found, t_c, "temperature_c")
    return _evaluate(found, t_c)


def temperature_c_from_reference_emf(emf_mv: float, tc_type: str) -> float:
    """Temperature in °C for an EMF (mV) referred to a 0 °C junction: the exact inverse."""
    found = thermocouple(tc_type)
    target = require_finite(emf_mv, "emf_mv")
    low, high = found.inverse_range_c
    e_low, e_high = _evaluate(found, low), _evaluate(found, high)
    # An EMF computed at a range end (E(t) − E(t_cj) + E(t_cj)) may miss it by rounding.
    if e_low - _EMF_ROUNDING_MV <= target < e_low:
        return low
    if e_high < target <= e_high + _EMF_ROUNDING_MV:
        return high
    if not e_low <= target <= e_high:
        raise OutOfRangeError(
            f"emf {target!r} mV (referred to 0 °C) is outside the type {found.letter} range "
            f"{e_low:.3f} to {e_high:.3f} mV ({low} to {high} °C)",
            argument="emf_mv",
        )
    # Bisection: every reference function is increasing on its inverse range, so the
    # bracket always holds the single root. 60 halvings of ≤ 2100 °C reach < 1e-9 °C.
    for _ in range(60):
        middle = 0.5 * (low + high)
        if _evaluate(found, middle) < target:
            low = middle
        else:
            high = middle
        if high - low < 1e-9:
            break
    return 0.5 * (low + high)


def emf_from_temperature(temperature_k: float, tc_type: str, cold_junction_c: float = 0.0) -> float:
    """EMF in mV a meter shows for a junction at ``temperature_k`` (K) when the meter's
    terminals (the cold junction) are at ``cold_junction_c`` (°C): E(t) − E(t_cj)."""
    found = thermocouple(tc_type)
    t_c = require_finite(temperature_k, "temperature_k") - ZERO_CELSIUS_K
    t_c = _check_range(found, t_c, "temperature_k (in °C)")
    t_cj = require_finite(cold_junction_c, "cold_junction_c")
    t_cj = _check_range(found, t_cj, "cold_junction_c")
    return _evaluate(found, t_c) - _evaluate(found, t_cj)


def temperature_from_emf(emf_mv: float, tc_type: str, cold_junction_c: float = 0.0) -> float:
    """Temperature in K from a thermocouple EMF (mV) read with the cold junction at
    ``cold_junction_c`` (°C; 0 for an ice bath or a meter that compensates internally).

    Type K reading 20.644 mV against 0 °C: 773.15 K (500 °C).
    """
    found = thermocouple(tc_type)
    emf = require_finite(emf_mv, "emf_mv")
    t_cj = require_finite(cold_junction_c, "cold_junction_c")
    t_cj = _check_range(found, t_cj, "cold_junction_c")
    referred = emf + _evaluate(found, t_cj)
    return temperature_c_from_reference_emf(referred, found.letter) + ZERO_CELSIUS_K
