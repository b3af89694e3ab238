"""Template filters that format numbers, units and ages for people reading a lab page.

Every filter here is pure (no database, no clock: ages are computed by the caller) and returns
a plain ``str``. None of them marks anything safe, so Django's autoescaping still applies to the
output — a unit or a name typed by a user can never inject markup. Exponents use Unicode
superscript characters rather than ``<sup>``, which is what makes that possible.

    {% load labbook_format %}
    {{ reading.value|channel_value:reading.channel }}   -> "2.3×10⁻¹⁰ mbar", "4.52 K", "63.0 %"
    {{ 1.5e-9|quantity:"A" }}                            -> "1.50 nA"
    {{ reading.age|age }}                                -> "4 min ago"
    {{ reading.age|is_stale }}                           -> True after one hour
    {{ 12345|thousands }}                                -> "12 345"
    {{ "CO2"|formula }}                                  -> "CO₂"
    {{ chamber.get_kind_display|kind_note:chamber.name }} -> "" when the name already says it
"""

from __future__ import annotations

import math
import re
from datetime import timedelta
from numbers import Real

from django import template

register = template.Library()

NBSP = "\u00a0"  # between a number and its unit: the pair never wraps apart
NNBSP = "\u202f"  # narrow no-break space: thousands separator (SI style)
MISSING = "—"

_SUPERSCRIPT = str.maketrans("0123456789-+", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻⁺")
_SUBSCRIPT = str.maketrans("0123456789", "₀₁₂₃₄₅₆₇₈₉")
# A plain chemical formula: element symbols with counts, e.g. N2, CO, CO2, C60, H2O, NaCl.
_FORMULA = re.compile(r"(?:[A-Z][a-z]?\d*)+")

# Units shown in scientific notation whatever their size: gauge pressures span twelve decades.
PRESSURE_UNITS = frozenset({"mbar", "bar", "pa", "hpa", "kpa", "torr", "mtorr", "atm", "psi"})

# Units that take an SI prefix when a value is far from 1 ("1.50 nA", "350 mV").
PREFIXABLE_UNITS = frozenset({"V", "A", "m", "Hz", "W", "N", "Ω", "F", "H", "T", "J", "C", "g"})
_PREFIXES = {
    -15: "f",
    -12: "p",
    -9: "n",
    -6: "µ",
    -3: "m",
    0: "",
    3: "k",
    6: "M",
    9: "G",
    12: "T",
}

# How trade spellings of units are shown. Anything not listed is shown as typed (escaped).
_UNIT_DISPLAY = {
    "degC": "°C",
    "degc": "°C",
    "celsius": "°C",
    "ohm": "Ω",
    "percent": "%",
    "uA": "µA",
    "uV": "µV",
    "um": "µm",
    "us": "µs",
    "ul/s": "µl/s",
}

STALE_AFTER = timedelta(hours=1)


def _number(value) -> float | None:
    """A float from a number, or None for anything that is not one (None, '', text)."""
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, Real):
        return float(value)
    try:
        return float(str(value).strip())
    except (TypeError, ValueError):
        return None


def _non_finite(x: float) -> str | None:
    if math.isnan(x):
        return "NaN"
    if math.isinf(x):
        return "∞" if x > 0 else "-∞"
    return None


def _digits(digits, default: int) -> int:
    try:
        n = int(digits)
    except (TypeError, ValueError):
        return default
    return min(max(n, 1), 15)


def display_unit(unit) -> str:
    """The unit as a reader expects to see it: 'degC' -> '°C', 'ohm' -> 'Ω'."""
    text = "" if unit is None else str(unit).strip()
    return _UNIT_DISPLAY.get(text, text)


def _join(number: str, unit: str) -> str:
    return f"{number}{NBSP}{unit}" if unit else number


def scientific(value, digits=2) -> str:
    """``2.3e-10`` -> ``'2.3×10⁻¹⁰'`` with ``digits`` significant figures (default 2)."""
    x = _number(value)
    if x is None:
        return MISSING
    special = _non_finite(x)
    if special:
        return special
    if x == 0:
        return "0"
    n = _digits(digits, 2)
    mantissa, exponent = f"{x:.{n - 1}e}".split("e")
    power = int(exponent)
    if power == 0:
        return mantissa
    return f"{mantissa}×10{str(power).translate(_SUPERSCRIPT)}"


def _significant(x: float, n: int) -> str:
    """``x`` to ``n`` significant figures in plain decimal notation, keeping trailing zeros."""
    if x == 0:
        return "0"
    magnitude = math.floor(math.log10(abs(x)))
    rounded = float(f"{x:.{n - 1}e}")  # rounding can carry into the next decade: 9.996 -> 10.0
    if rounded != 0:
        magnitude = math.floor(math.log10(abs(rounded)))
    decimals = max(n - 1 - magnitude, 0)
    return f"{rounded:.{decimals}f}"


def _with_prefix(x: float, unit: str, n: int) -> str:
    """``1.5e-9 A`` -> ``'1.50 nA'``: the prefix that leaves 1 <= |mantissa| < 1000."""
    power = math.floor(math.log10(abs(x)) / 3) * 3
    power = min(max(power, min(_PREFIXES)), max(_PREFIXES))
    scaled = x / 10**power
    text = _significant(scaled, n)
    if abs(float(text)) >= 1000 and power + 3 in _PREFIXES:  # rounding reached the next prefix
        power += 3
        text = _significant(x / 10**power, n)
    return _join(text, f"{_PREFIXES[power]}{unit}")


def format_quantity(value, unit="", quantity: str | None = None, digits: int | None = None) -> str:
    """A value in its unit, in the notation a lab reads it in.

    Pressures (by ``quantity`` or by a pressure unit) are scientific with 2 significant figures;
    base SI units take a prefix; everything else is shown to 3 significant figures, switching to
    scientific notation below 10⁻³ and from 10⁶ on. None (no reading) is an em dash.
    """
    x = _number(value)
    shown_unit = display_unit(unit)
    if x is None:
        return MISSING
    special = _non_finite(x)
    if special:
        return _join(special, shown_unit)
    is_pressure = quantity == "pressure" or shown_unit.lower() in PRESSURE_UNITS
    if is_pressure:
        return _join(scientific(x, digits or 2), shown_unit)
    n = _digits(digits, 3)
    if x == 0:
        return _join("0", shown_unit)
    if shown_unit in PREFIXABLE_UNITS:
        return _with_prefix(x, shown_unit, n)
    if 1e-3 <= abs(x) < 1e6:
        return _join(_significant(x, n), shown_unit)
    return _join(scientific(x, n), shown_unit)


@register.filter(name="sci")
def sci_filter(value, digits=2) -> str:
    """``{{ 2.34e-10|sci }}`` -> ``2.3×10⁻¹⁰``; ``{{ x|sci:3 }}`` for three figures."""
    return scientific(value, digits)


@register.filter(name="quantity")
def quantity_filter(value, unit="") -> str:
    """``{{ value|quantity:"mbar" }}`` -> ``2.3×10⁻¹⁰ mbar``; ``{{ 0.35|quantity:"V" }}``
    -> ``350 mV``."""
    return format_quantity(value, unit)


@register.filter(name="unit")
def unit_filter(unit) -> str:
    """``{{ channel.unit|unit }}`` -> the unit as shown next to values ('degC' -> '°C')."""
    return display_unit(unit)


@register.filter(name="channel_value")
def channel_value(value, channel) -> str:
    """``{{ reading.value|channel_value:reading.channel }}``: the value in the channel's unit,
    scientific when the channel logs a pressure. ``channel`` needs ``unit`` and ``quantity``."""
    unit = getattr(channel, "unit", "") or ""
    quantity = getattr(channel, "quantity", None)
    return format_quantity(value, unit, quantity=quantity)


def _as_timedelta(value) -> timedelta | None:
    if isinstance(value, timedelta):
        return value
    seconds = _number(value)
    if seconds is None or _non_finite(seconds):
        return None
    return timedelta(seconds=seconds)


def format_age(value) -> str:
    """How long ago, roughly and briefly: 'just now', '42 s ago', '4 min ago', '3 h ago',
    '2 d ago'. Takes a timedelta (or seconds). A negative age (a logger whose clock runs ahead)
    reads 'ahead of now'; no age at all reads 'never'."""
    age = _as_timedelta(value)
    if age is None:
        return "never"
    seconds = age.total_seconds()
    if seconds < -5:
        return "ahead of now"
    if seconds < 5:
        return "just now"
    if seconds < 60:
        return f"{int(seconds)}{NBSP}s ago"
    if seconds < 3600:
        return f"{int(seconds // 60)}{NBSP}min ago"
    if seconds < 48 * 3600:
        hours = int(seconds // 3600)
        return f"{hours}{NBSP}h ago"
    days = int(seconds // 86400)
    return f"{days}{NBSP}d ago"


@register.filter(name="age")
def age_filter(value) -> str:
    """``{{ reading.age|age }}`` -> ``4 min ago``."""
    return format_age(value)


@register.filter(name="is_stale")
def is_stale(value, after_seconds=None) -> bool:
    """True when an age is older than one hour (or ``after_seconds``). No age (never read)
    is not 'stale' — the page says 'no readings yet' instead."""
    age = _as_timedelta(value)
    if age is None:
        return False
    limit = STALE_AFTER
    if after_seconds not in (None, ""):
        seconds = _number(after_seconds)
        if seconds is not None and not _non_finite(seconds):
            limit = timedelta(seconds=seconds)
    return age > limit


@register.filter(name="thousands")
def thousands(value) -> str:
    """``{{ 1234567|thousands }}`` -> ``1 234 567`` (narrow no-break spaces, SI style)."""
    x = _number(value)
    if x is None or _non_finite(x):
        return MISSING if x is None else _non_finite(x)
    return f"{round(x):,}".replace(",", NNBSP)


@register.filter(name="formula")
def formula(value) -> str:
    """``{{ channel.gas|formula }}``: counts in a plain chemical formula become subscripts
    (N2 -> N₂, C60 -> C₆₀). Anything that is not a plain formula is shown as typed."""
    text = "" if value is None else str(value).strip()
    if _FORMULA.fullmatch(text):
        return text.translate(_SUBSCRIPT)
    return text


@register.filter(name="kind_note")
def kind_note(kind, name) -> str:
    """The kind of a thing, unless its name already says it: 'preparation chamber' for a
    chamber named 'Main', nothing for one named 'Prep' or 'Load lock'."""
    kind_text = "" if kind is None else str(kind).strip()
    name_text = "" if name is None else str(name).strip().lower()
    first = kind_text.lower().split(" ")[0] if kind_text else ""
    if not kind_text or not name_text:
        return kind_text
    name_first = name_text.split(" ")[0]
    if first.startswith(name_first) or name_first.startswith(first):
        return ""
    return kind_text
