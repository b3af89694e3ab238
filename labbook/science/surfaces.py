"""Surfaces: lattice constants, surface atom densities and what "1 ML" means.

A coverage in monolayers (ML) means nothing without its definition, so every coverage
labbook stores carries a :class:`MonolayerDefinition`:

* ``substrate_atom`` — 1 ML = one adsorbate atom per substrate surface atom (the
  "pseudomorphic" ML), with the density of the bulk-terminated (1×1) surface computed
  from the room-temperature lattice constant (the usual convention; low-temperature lattice
  constants are about 0.3 % smaller, from memory).
* ``closed_layer`` — 1 ML = one closed layer of the adsorbate (large molecules, films); its
  density may be unknown.
* ``molecules_per_nm2`` — dilute adsorbates counted per nm²; the "ML" is then 1 nm⁻²
  (= 1e14 cm⁻²).

Densities (atoms per cm², ``a`` the cubic lattice constant):

* fcc(111): 4/(√3 a²); fcc(100): 2/a²; fcc(110): √2/a².
* diamond (Si) per atomic layer: (111) 4/(√3 a²) — one atom per layer of the hexagonal
  net of side a/√2, the bilayer holds twice that; (100) 2/a²; (110) 2√2/a² (both atoms of
  the basis lie in the same (110) plane).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Literal, NamedTuple

from labbook.science.errors import (
    ScienceInputError,
    UnknownNameError,
    require_non_negative,
    require_positive,
)

ANGSTROM_CM = 1e-8

Structure = Literal["fcc", "diamond"]


@dataclass(frozen=True)
class LatticeConstant:
    """Cubic lattice constant ``a_angstrom`` (room temperature) with its crystal structure."""

    element: str
    a_angstrom: float
    structure: Structure
    source: str


#: Room-temperature cubic lattice constants (REFERENCES.md §6, with its verification tags).
LATTICE_CONSTANTS: Mapping[str, LatticeConstant] = MappingProxyType(
    {
        "Cu": LatticeConstant(
            "Cu", 3.6149, "fcc", "CRC Handbook, H. W. King's table (value from memory: MEM)"
        ),
        "Ag": LatticeConstant(
            "Ag",
            4.0853,
            "fcc",
            "CRC Handbook (H. W. King) and Davey (1925), as quoted in a public page (SRCH)",
        ),
        "Au": LatticeConstant(
            "Au",
            4.0782,
            "fcc",
            "CRC Handbook (H. W. King) and Davey (1925), as quoted in a public page (SRCH)",
        ),
        "Si": LatticeConstant(
            "Si",
            5.431020511,
            "diamond",
            "CODATA 2018 lattice parameter of silicon, as in scipy.constants (SC); "
            "22.5 °C in vacuum (conditions from memory)",
        ),
    }
)

# Surface atoms per a² of the cubic cell, per atomic layer, by structure and facet.
_DENSITY_PER_A2: Mapping[str, Mapping[str, float]] = MappingProxyType(
    {
        "fcc": MappingProxyType({"111": 4.0 / math.sqrt(3.0), "100": 2.0, "110": math.sqrt(2.0)}),
        "diamond": MappingProxyType(
            {"111": 4.0 / math.sqrt(3.0), "100": 2.0, "110": 2.0 * math.sqrt(2.0)}
        ),
    }
)


class Substrate(NamedTuple):
    """A substrate as written on a sample: material and facet, e.g. ("Cu", "111")."""

    element: str
    facet: str


_SUBSTRATE = re.compile(
    r"^\s*(?P<material>[A-Z][A-Za-z0-9]*)\s*\(\s*(?P<indices>[^()]*?)\s*\)(?P<rest>.*)$"
)
_RECONSTRUCTION = re.compile(r"^\s*(?:-\s*)?\(?[^()]*\)?\s*$")


def _miller_indices(text: str, original: str) -> list[int]:
    compact = text.replace("\u2212", "-")
    if re.search(r"[\s,]", compact):
        tokens = [t for t in re.split(r"[\s,]+", compact) if t]
        if not all(re.fullmatch(r"-?\d+", t) for t in tokens):
            tokens = []
    else:
        # Written without separators, each index is one digit with an optional minus.
        tokens = re.findall(r"-?\d", compact) if re.fullmatch(r"(?:-?\d)+", compact) else []
    if len(tokens) not in (3, 4):
        raise ScienceInputError(
            f"substrate {original!r}: the facet must be 3 Miller indices such as (111) or "
            "4 Miller-Bravais indices such as (0001)",
            argument="substrate",
        )
    indices = [int(t) for t in tokens]
    if len(indices) == 4 and indices[2] != -(indices[0] + indices[1]):
        raise ScienceInputError(
            f"substrate {original!r}: Miller-Bravais indices (hkil) need i = -(h + k)",
            argument="substrate",
        )
    if not any(indices):
        raise ScienceInputError(
            f"substrate {original!r}: the facet (000) is not a plane", argument="substrate"
        )
    return indices


def _facet_string(indices: list[int]) -> str:
    # Single-digit indices are written together, "1-10"; larger ones with spaces.
    if all(abs(i) < 10 for i in indices):
        return "".join(str(i) for i in indices)
    return " ".join(str(i) for i in indices)


def parse_substrate(substrate: str) -> Substrate:
    """Split a substrate name into material and facet: "Cu(111)" → ("Cu", "111").

    Accepts "Cu(111)", "Cu (1 1 1)", "Cu(001)", "Cu(1-10)", "Ru(0001)" and a trailing
    reconstruction, which is ignored ("Si(111)-7x7" → ("Si", "111")): the ML density is that
    of the bulk-terminated surface by convention. Indices are kept as written; use
    :func:`monolayer_density_per_cm2` for symmetry-equivalent facets of cubic crystals.
    """
    if not isinstance(substrate, str):
        raise ScienceInputError(
            f"substrate must be a string such as 'Cu(111)', got {substrate!r}",
            argument="substrate",
        )
    match = _SUBSTRATE.match(substrate)
    if match is None:
        raise ScienceInputError(
            f"substrate {substrate!r} is not of the form 'Cu(111)' (material, then the facet "
            "in brackets)",
            argument="substrate",
        )
    rest = match.group("rest")
    if rest and not (rest[0] in "- (" and _RECONSTRUCTION.match(rest)):
        raise ScienceInputError(
            f"substrate {substrate!r}: unexpected text {rest!r} after the facet (a "
            "reconstruction is written 'Si(111)-7x7')",
            argument="substrate",
        )
    indices = _miller_indices(match.group("indices"), substrate)
    return Substrate(match.group("material"), _facet_string(indices))


def _cubic_facet(facet: str, substrate: str) -> str:
    indices = _miller_indices(facet, substrate)
    if len(indices) != 3:
        raise ScienceInputError(
            f"substrate {substrate!r}: a cubic crystal takes 3 Miller indices",
            argument="substrate",
        )
    # Cubic symmetry: permutations and sign changes of (hkl) are equivalent planes, so
    # (001), (0-10) and (100) are one facet.
    return "".join(str(i) for i in sorted((abs(i) for i in indices), reverse=True))


def monolayer_density_per_cm2(
    substrate: str | tuple[str, str],
    *,
    lattice_constant_angstrom: float | None = None,
    structure: Structure | None = None,
) -> float:
    """Surface atom density (atoms/cm²) of one atomic layer of a cubic crystal face.

    ``substrate`` is "Cu(111)" or ("Cu", "111"). Cu(111) → 1.767e15, Cu(100) → 1.5305e15,
    Ag(111) → 1.384e15, Au(111) → 1.389e15, Si(111) → 7.830e14 (per layer; the bilayer is
    twice that). For an element not in :data:`LATTICE_CONSTANTS`, or another lattice
    constant (e.g. a low-temperature one), pass ``lattice_constant_angstrom`` (Å) and,
    for a new element, ``structure`` ("fcc" or "diamond").
    """
    if isinstance(substrate, str):
        element, facet = parse_substrate(substrate)
        shown = substrate
    elif (
        isinstance(substrate, tuple)
        and len(substrate) == 2
        and all(isinstance(part, str) for part in substrate)
    ):
        element, facet = substrate
        shown = f"{element}({facet})"
    else:
        raise ScienceInputError(
            f"substrate must be 'Cu(111)' or ('Cu', '111'), got {substrate!r}",
            argument="substrate",
        )
    known = LATTICE_CONSTANTS.get(element)
    if known is None and (lattice_constant_angstrom is None or structure is None):
        raise UnknownNameError(
            f"substrate {shown!r}: no lattice constant for {element!r} (known: "
            f"{', '.join(LATTICE_CONSTANTS)}); pass lattice_constant_angstrom and structure",
            argument="substrate",
        )
    kind = structure or (known.structure if known else None)
    if kind not in _DENSITY_PER_A2:
        raise UnknownNameError(
            f"structure {kind!r} is unknown; use 'fcc' or 'diamond'", argument="structure"
        )
    if lattice_constant_angstrom is not None:
        a_angstrom = require_positive(lattice_constant_angstrom, "lattice_constant_angstrom")
    elif known is not None:
        a_angstrom = known.a_angstrom
    else:  # pragma: no cover - excluded by the check above
        raise UnknownNameError(f"no lattice constant for {element!r}", argument="substrate")
    cubic = _cubic_facet(facet, shown)
    per_a2 = _DENSITY_PER_A2[kind].get(cubic)
    if per_a2 is None:
        raise UnknownNameError(
            f"substrate {shown!r}: no density formula for the ({cubic}) face of a {kind} "
            f"crystal (known: {', '.join(_DENSITY_PER_A2[kind])})",
            argument="substrate",
        )
    a_cm = a_angstrom * ANGSTROM_CM
    return per_a2 / (a_cm * a_cm)


MonolayerKind = Literal["substrate_atom", "closed_layer", "molecules_per_nm2"]
_KINDS = ("substrate_atom", "closed_layer", "molecules_per_nm2")

#: 1 nm⁻² in cm⁻² (1 cm = 1e7 nm).
PER_NM2_IN_PER_CM2 = 1e14


@dataclass(frozen=True)
class MonolayerDefinition:
    """What "1 ML" means for a coverage: kind, density of 1 ML (cm⁻², or ``None`` if not
    known, e.g. a closed layer of a large molecule) and a human description."""

    kind: MonolayerKind
    density_per_cm2: float | None
    description: str

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise ScienceInputError(
                f"kind {self.kind!r} is unknown; use one of {', '.join(_KINDS)}",
                argument="kind",
            )
        if self.density_per_cm2 is None:
            if self.kind != "closed_layer":
                raise ScienceInputError(
                    f"a {self.kind} monolayer needs density_per_cm2", argument="density_per_cm2"
                )
        else:
            require_positive(self.density_per_cm2, "density_per_cm2")
        if not isinstance(self.description, str) or not self.description.strip():
            raise ScienceInputError("description must be a non-empty text", argument="description")

    @classmethod
    def substrate_atom(cls, substrate: str) -> MonolayerDefinition:
        """1 ML = one atom per surface atom of ``substrate`` (e.g. "Cu(111)")."""
        element, facet = parse_substrate(substrate)
        density = monolayer_density_per_cm2((element, facet))
        lattice = LATTICE_CONSTANTS[element]
        return cls(
            "substrate_atom",
            density,
            f"1 ML = one atom per surface atom of {element}({facet}), {density:.4g} cm⁻² "
            f"(a = {lattice.a_angstrom} Å, {lattice.source})",
        )

    @classmethod
    def closed_layer(
        cls, description: str, density_per_cm2: float | None = None
    ) -> MonolayerDefinition:
        """1 ML = one closed layer of the adsorbate, density known or not."""
        return cls("closed_layer", density_per_cm2, description)

    @classmethod
    def molecules_per_nm2(cls) -> MonolayerDefinition:
        """Coverage counted in molecules per nm² (the unit is 1 nm⁻² = 1e14 cm⁻²)."""
        return cls("molecules_per_nm2", PER_NM2_IN_PER_CM2, "coverage in molecules per nm²")

    def areal_density_per_cm2(self, coverage: float) -> float:
        """Adsorbate particles per cm² for a coverage given in this definition's units."""
        value = require_non_negative(coverage, "coverage")
        if self.density_per_cm2 is None:
            raise ScienceInputError(
                f"the monolayer ({self.description}) has no known density", argument="coverage"
            )
        return value * self.density_per_cm2


def convert_coverage(
    coverage: float, from_definition: MonolayerDefinition, to_definition: MonolayerDefinition
) -> float:
    """Re-express a coverage in another ML definition (both must have a density).

    0.5 ML of Cu(111) is 0.5 × 1.767e15 / 1.384e15 = 0.638 ML counted on Ag(111) atoms.
    """
    particles = from_definition.areal_density_per_cm2(coverage)
    if to_definition.density_per_cm2 is None:
        raise ScienceInputError(
            f"the target monolayer ({to_definition.description}) has no known density",
            argument="to_definition",
        )
    return particles / to_definition.density_per_cm2
