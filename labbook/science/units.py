"""Quantity parsing with pint, and the canonical unit each stored field carries.

Everywhere a number is accepted, labbook also accepts a string with a unit ("2e-6 mbar",
"1.5 kV", "15 min", "5 uA", "1 keV", "773 K", "500 degC"). :func:`parse_quantity` reads
either and returns the magnitude in the field's canonical unit.

Units added to pint's default registry (it has none of them):

* ``langmuir`` — gas exposure, 1 langmuir = 1e-6 Torr·s exactly (Lüth, *Surfaces and
  Interfaces of Solid Materials*). No short symbol: "L" stays the litre.
* ``Torr`` — an alias of pint's ``torr``, because the trade writes it with a capital T;
  prefixed forms follow ("mTorr").
* ``monolayer`` (symbol ``ML``) — a coverage unit on its own dimension ``[coverage]``, so
  "0.3 ML" reads as a coverage and not as pint's megalitre, and a coverage is never
  silently taken for a plain number with another meaning.

Energies of singly charged ions: a beam energy written as an accelerating voltage ("1.5 kV")
is read as the kinetic energy of a singly charged ion accelerated through it, 1.5 kV →
1500 eV (E = q·U with q = e). This only happens when the field expects an energy and the
string carries a voltage; a multiply charged ion (charge state n) has E = n·e·U and must be
given as an energy. The reverse (an energy where a voltage is expected) is *not* accepted,
so a bias can never be typed in eV by mistake.
"""

from __future__ import annotations

import functools
import math
import re
import tokenize
from numbers import Real
from typing import Any

import pint

from labbook.science.errors import QuantityError

#: The registry every labbook module uses. Quantities from different registries cannot be
#: mixed in pint, so callers should build quantities with this one (``ureg.Quantity``).
ureg = pint.UnitRegistry()
ureg.define("@alias torr = Torr")
ureg.define("langmuir = 1e-6 * torr * second")
ureg.define("monolayer = [coverage] = ML")

Quantity = ureg.Quantity

# Canonical unit of a stored field, found from the suffix of its name (DESIGN §2, "SI
# inside": the unit is named in the field). Longest suffix first so "_ml_per_min" wins
# over "_min"-like endings.
_FIELD_SUFFIX_UNITS: tuple[tuple[str, str], ...] = (
    ("_ml_per_min", "monolayer / minute"),
    ("_l_per_day", "liter / day"),
    ("_k_per_s", "kelvin / second"),
    ("_per_cm2_s", "1 / centimeter ** 2 / second"),
    ("_per_cm2", "1 / centimeter ** 2"),
    ("_langmuir", "langmuir"),
    ("_mbar", "millibar"),
    ("_torr", "torr"),
    ("_pa", "pascal"),
    ("_cm2", "centimeter ** 2"),
    ("_ev", "electron_volt"),
    ("_hz", "hertz"),
    ("_ml", "monolayer"),
    ("_s", "second"),
    ("_a", "ampere"),
    ("_v", "volt"),
    ("_k", "kelvin"),
    ("_m", "meter"),
    ("_l", "liter"),
    ("_w", "watt"),
)

# "2x10^-6", "2×10^-6", "2·10**-6", "2*10^-6" -> "2e-6"; unicode minus and superscripts.
_SUPERSCRIPTS = str.maketrans("⁰¹²³⁴⁵⁶⁷⁸⁹⁻⁺", "0123456789-+")
# The power sign is required: "3 x 100 mbar" must not become "3e0 mbar".
_TIMES_TEN = re.compile(
    r"(?<=\d)\s*[x×·*]\s*10\s*(?:\^|\*\*)\s*(?P<exp>[+-]?\d+)", flags=re.IGNORECASE
)
_TIMES_TEN_SUPERSCRIPT = re.compile(r"(?<=\d)\s*[x×·*]\s*10(?P<exp>[⁻⁺]?[⁰¹²³⁴⁵⁶⁷⁸⁹]+)")
_NUMBER_THEN_UNIT = re.compile(
    r"^\s*(?P<number>[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(?P<unit>.*?)\s*$"
)

# What pint's unit parser raises for text that is not a unit expression: its own errors,
# and plain Python errors from its tokenizer for stray symbols.
_UNIT_PARSE_ERRORS = (
    pint.errors.PintError,
    # pint's expression builder asserts on some malformed token streams.
    AssertionError,
    AttributeError,
    IndexError,
    KeyError,
    SyntaxError,
    tokenize.TokenError,
    TypeError,
    ValueError,
)

_ENERGY = ureg.electron_volt.dimensionality
_POTENTIAL = ureg.volt.dimensionality


def unit_for_field(field: str) -> str:
    """Return the canonical pint unit of a field from the suffix of its name.

    ``unit_for_field("pressure_mbar")`` → ``"millibar"``; ``"energy_ev"`` → ``"electron_volt"``.
    Raises :class:`QuantityError` for a name without a known unit suffix.
    """
    lowered = field.lower()
    for suffix, unit in _FIELD_SUFFIX_UNITS:
        if lowered.endswith(suffix):
            return unit
    raise QuantityError(
        f"{field}: the field name carries no known unit suffix "
        f"(one of {', '.join(s for s, _ in _FIELD_SUFFIX_UNITS)})",
        field=field,
    )


def _parse_unit(unit: str, *, field: str) -> pint.Unit:
    try:
        return ureg.parse_units(unit)
    except _UNIT_PARSE_ERRORS as exc:
        raise QuantityError(
            f"{field}: the target unit {unit!r} is not a unit pint knows", field=field
        ) from exc


def _normalise_number_syntax(text: str) -> str:
    text = text.replace("\u2212", "-")  # unicode minus sign
    text = _TIMES_TEN_SUPERSCRIPT.sub(lambda m: "e" + m.group("exp").translate(_SUPERSCRIPTS), text)
    return _TIMES_TEN.sub(lambda m: "e" + m.group("exp"), text)


# Longer than any quantity typed by hand; pint's parser recurses on long expressions.
MAX_QUANTITY_CHARS = 200


def _quantity_from_string(text: str, target: pint.Unit, *, field: str) -> pint.Quantity:
    if len(text) > MAX_QUANTITY_CHARS:
        raise QuantityError(
            f"{field}: the value is {len(text)} characters long; a quantity has at most "
            f"{MAX_QUANTITY_CHARS}",
            field=field,
            expected=str(target),
        )
    if not text.isprintable():
        raise QuantityError(
            f"{field}: {text!r} contains control characters", field=field, expected=str(target)
        )
    cleaned = _normalise_number_syntax(text.strip())
    if not cleaned:
        raise QuantityError(
            f"{field}: empty value, expected a number in {target:~P} or a quantity with a unit",
            field=field,
            expected=str(target),
        )
    match = _NUMBER_THEN_UNIT.match(cleaned)
    if match is None:
        raise QuantityError(
            f"{field}: cannot read {text!r} as a number with a unit "
            f"(expected e.g. '2e-6 mbar'; the field is stored in {target:~P})",
            field=field,
            expected=str(target),
        )
    number = float(match.group("number"))
    unit_text = match.group("unit")
    if re.match(r"^,\d", unit_text):
        raise QuantityError(
            f"{field}: {text!r} uses a decimal comma; write the number with a decimal point",
            field=field,
            expected=str(target),
        )
    if not unit_text:
        # A bare number in a string is taken in the field's own unit, like a bare number.
        return ureg.Quantity(number, target)
    try:
        unit = ureg.parse_units(unit_text)
    except _UNIT_PARSE_ERRORS as exc:
        raise QuantityError(
            f"{field}: unknown unit {unit_text!r} in {text!r}; expected a quantity "
            f"convertible to {target:~P} ({target})",
            field=field,
            expected=str(target),
        ) from exc
    return ureg.Quantity(number, unit)


def _to_target(
    quantity: pint.Quantity,
    target: pint.Unit,
    *,
    field: str,
    shown: str,
    voltage_as_ion_energy: bool = False,
) -> float:
    if (
        voltage_as_ion_energy
        and quantity.dimensionality == _POTENTIAL
        and target.dimensionality == _ENERGY
    ):
        # Beam energy given as an accelerating voltage: a singly charged ion gains
        # e·U, so the number of volts is the number of electronvolts (module docstring).
        quantity = ureg.Quantity(quantity.to(ureg.volt).magnitude, ureg.electron_volt)
    try:
        magnitude = quantity.to(target).magnitude
    except pint.errors.DimensionalityError as exc:
        raise QuantityError(
            f"{field}: {shown} is in {quantity.units:~P}, which cannot be converted to "
            f"{target:~P} (expected a quantity of dimension {target.dimensionality})",
            field=field,
            expected=str(target),
        ) from exc
    except pint.errors.OffsetUnitCalculusError as exc:
        raise QuantityError(
            f"{field}: {shown} mixes an offset temperature unit in a way pint cannot convert "
            f"to {target:~P}; give the temperature in kelvin",
            field=field,
            expected=str(target),
        ) from exc
    magnitude = float(magnitude)
    if not math.isfinite(magnitude):
        raise QuantityError(
            f"{field}: {shown} is not a finite number", field=field, expected=str(target)
        )
    return magnitude


def parse_quantity(value: Any, unit: str, *, field: str) -> float:
    """Read ``value`` and return its magnitude in ``unit`` as a float.

    ``value`` may be a real number (taken to be in ``unit`` already), a pint quantity from
    :data:`ureg`, or a string: "2e-6 mbar", "1.5 kV", "15 min", "5 uA", "500 degC", "0.3 ML",
    "2×10^-6 mbar". A string with no unit is taken in ``unit``. Temperatures with an offset
    (°C, °F) are converted as temperatures ("500 degC" → 773.15 K), rates such as
    "10 degC/min" as temperature differences. A voltage where an energy is expected is read
    as the energy of a singly charged ion ("1.5 kV" → 1500 eV; see the module docstring).

    Raises :class:`QuantityError` (carrying ``field`` and the expected unit) for an unknown
    unit, an incompatible unit, an unreadable string, NaN or infinity.
    """
    target = _parse_unit(unit, field=field)
    if isinstance(value, pint.Quantity):
        # Rebuild it in our registry: pint refuses to mix quantities of two registries.
        quantity = ureg.Quantity(value.magnitude, str(value.units))
        shown = f"{quantity:~P}"
    elif isinstance(value, str):
        quantity = _quantity_from_string(value, target, field=field)
        shown = repr(value)
    elif isinstance(value, Real) and not isinstance(value, bool):
        try:
            number = float(value)
        except OverflowError:
            raise QuantityError(
                f"{field}: {value!r} is beyond the range of a number",
                field=field,
                expected=str(target),
            ) from None
        quantity = ureg.Quantity(number, target)
        shown = repr(value)
    else:
        raise QuantityError(
            f"{field}: expected a number in {target:~P} or a string with a unit, "
            f"got {type(value).__name__}",
            field=field,
            expected=str(target),
        )
    if not isinstance(quantity.magnitude, Real):
        raise QuantityError(
            f"{field}: expected a single number, got {quantity.magnitude!r}",
            field=field,
            expected=str(target),
        )
    return _to_target(quantity, target, field=field, shown=shown, voltage_as_ion_energy=True)


def parse_field(value: Any, field: str) -> float:
    """:func:`parse_quantity` into the unit named by the field's suffix (:func:`unit_for_field`).

    ``parse_field("5 uA", "current_a")`` → 5e-06.
    """
    return parse_quantity(value, unit_for_field(field), field=field)


def convert(value: float, from_unit: str, to_unit: str, *, field: str = "value") -> float:
    """Convert a number from ``from_unit`` to ``to_unit`` (offset temperatures handled).

    ``convert(1.0, "torr", "mbar")`` → 1.3332236842105263. A plain unit conversion: unlike
    :func:`parse_quantity` it never reads a voltage as an ion energy. Raises
    :class:`QuantityError` for unknown or incompatible units or a non-finite value.
    """
    source = _parse_unit(from_unit, field=field)
    target = _parse_unit(to_unit, field=field)
    if isinstance(value, bool) or not isinstance(value, Real):
        raise QuantityError(
            f"{field}: expected a real number, got {type(value).__name__}",
            field=field,
            expected=str(target),
        )
    if not math.isfinite(float(value)):
        raise QuantityError(f"{field}: {value!r} is not a finite number", field=field)
    quantity = ureg.Quantity(float(value), source)
    return _to_target(quantity, target, field=field, shown=f"{value!r} {from_unit}")


# --- many values into one unit (logged readings) -----------------------------------------------


@functools.lru_cache(maxsize=1024)
def _linear_map(from_unit: str, to_unit: str) -> tuple[float, float] | None:
    """(scale, offset) with value_in_to = value_in_from · scale + offset, or None when the two
    units are not related by such a map (wrong dimension, or a voltage taken as an energy)."""
    try:
        source = ureg.parse_units(from_unit)
        target = ureg.parse_units(to_unit)
    except _UNIT_PARSE_ERRORS:
        return None
    if source.dimensionality != target.dimensionality:
        return None
    try:
        at_zero = float(ureg.Quantity(0.0, source).to(target).magnitude)
        at_one = float(ureg.Quantity(1.0, source).to(target).magnitude)
    except (pint.errors.DimensionalityError, pint.errors.OffsetUnitCalculusError):
        return None
    return at_one - at_zero, at_zero


def parse_many(value: Any, unit: str, *, field: str) -> float:
    """:func:`parse_quantity` for a stream of values in a few recurring units (a logger's
    batch of "2.1e-10 mbar", "2.3e-10 mbar", …): the unit conversion is looked up once per
    distinct unit and cached, so a batch costs a regex and a multiply per value. Every case
    the cache cannot settle (an odd syntax, an unknown or incompatible unit) goes through
    :func:`parse_quantity` and gets its full error message."""
    if isinstance(value, Real) and not isinstance(value, bool):
        number = float(value)
        if math.isfinite(number):
            return number
    elif isinstance(value, str):
        match = _NUMBER_THEN_UNIT.match(value)
        if match is not None:
            unit_text = match.group("unit")
            number = float(match.group("number"))
            if not unit_text:
                return number
            mapping = _linear_map(unit_text, unit)
            if mapping is not None:
                converted = number * mapping[0] + mapping[1]
                if math.isfinite(converted):
                    return converted
    return parse_quantity(value, unit, field=field)
