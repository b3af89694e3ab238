"""From a file's header, as the instrument wrote it, to labbook's normalised metadata.

Every reader collects its header as a flat mapping of ``key -> value`` (an HDF5 reader uses
the object's path as the key, ``entry/sample/temperature``; a text reader the header line's
key) and calls :func:`normalise_metadata`. It returns the fields of DESIGN §4 "file
metadata" with the unit their name carries (``bias_v`` in volts, ``setpoint_a`` in amperes,
``scan_size_m`` as ``[x, y]`` in metres, ``acquired_at`` an aware UTC datetime …) plus the
warnings about every value it could not use. Nothing is dropped silently: a value that cannot
be read, that disagrees with another key, or that is physically implausible is left out and
named in a warning; the raw header keeps it as found.

Unit-carrying values are read with :func:`labbook.science.units.parse_quantity`, so any unit
pint knows is accepted ("0.5 V", "50 pA", "20 nm", "5 mV rms"). A bare number is taken in the
field's canonical unit, then checked against a plausible range: "setpoint: 50" (50 A) is
refused with a warning instead of being stored as a tunnelling current.

Pure Python: no Django import (DESIGN §2, "Science is pure").
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta, timezone, tzinfo
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pint

from labbook.science.errors import QuantityError
from labbook.science.units import parse_quantity, ureg

__all__ = [
    "CANONICAL_FIELDS",
    "arbitrary_unit",
    "axis_name",
    "jsonable",
    "normalise_key",
    "normalise_metadata",
    "si_scale",
    "snake",
    "split_label",
    "to_si",
]

# --- keys --------------------------------------------------------------------------------------

_UNIT_IN_BRACKETS = re.compile(r"^(?P<name>.*?)\s*[(\[](?P<unit>[^()\[\]]*)[)\]]\s*$")
_UNIT_AFTER_SLASH = re.compile(r"^(?P<name>[^/]*[A-Za-z][^/]*?)\s*/\s*(?P<unit>[^/\s][^/]*)$")
# A derivative written with a slash, "dI/dV", "d2I/dV2", "d²I/dV²", "d^2 I / d V^2": the slash is
# part of the name, not "quantity / unit". The quantities are one or two letters (I, V, Z, Vb),
# so "depth/dm" (a depth in decimetres) is not taken for one.
_DERIVATIVE = re.compile(
    r"(?<![A-Za-z0-9])d(?:\^?[0-9²³])?\s*[A-Za-z]{1,2}\s*/\s*d\s*[A-Za-z]{1,2}(?:\^?[0-9²³])?"
    r"(?![A-Za-z0-9])"
)
# Stands in for a derivative's slash while the label is split (a private-use character).
_KEPT_SLASH = "\ue000"
# "(dI/dV)/(I/V)": a ratio of bracketed quantities, the last bracket is not a unit.
_BRACKETED = re.compile(r"^[(\[][^()\[\]]*[)\]]$")
_NOT_ALNUM = re.compile(r"[^0-9a-z]+")


def snake(text: str) -> str:
    """``"LockIn X"`` → ``"lockin_x"``: lower case, one underscore between words.

    "lock-in"/"lock in" become "lockin" and Δ/δ "delta", so the many ways of writing the same
    quantity meet on one key.
    """
    lowered = text.strip().lower().replace("δ", "delta_")
    lowered = re.sub(r"lock[\s_-]*in", "lockin", lowered)
    return _NOT_ALNUM.sub("_", lowered).strip("_")


def split_label(label: str, *, slash_unit: bool = False) -> tuple[str, str | None]:
    """Split a column or key label into ``(name, unit)``.

    ``"Bias (V)"`` and ``"bias [V]"`` → ``("Bias", "V")``; with ``slash_unit`` (column labels,
    where "quantity / unit" is the physicist's way of writing a column head) ``"Bias/V"`` →
    ``("Bias", "V")``. A label without a unit gives ``(label, None)``.

    A derivative's slash is part of the name: ``"dI/dV"`` → ``("dI/dV", None)``,
    ``"d2I/dV2"`` likewise, ``"dI/dV (a.u.)"`` → ``("dI/dV", "a.u.")``, and a unit after it
    is still read, ``"dI/dV / nS"`` and ``"dI/dV/(A/V)"`` → ``("dI/dV", "nS")``,
    ``("dI/dV", "A/V")``. A ratio of bracketed quantities, ``"(dI/dV)/(I/V)"``, is a name
    with no unit. A bare ``"I/V"`` stays "I in volts" (a preamplifier's output is often
    logged so): only the brackets make a ratio unambiguous.
    """
    text = label.strip().lstrip("#%").strip()
    masked = _DERIVATIVE.sub(lambda m: m.group(0).replace("/", _KEPT_SLASH), text)

    def restored(part: str) -> str:
        return part.replace(_KEPT_SLASH, "/").strip()

    match = _UNIT_IN_BRACKETS.match(masked)
    if match and match.group("name"):
        name = match.group("name").strip()
        if name.endswith("/"):  # "dI/dV/(A/V)": the slash before a bracketed unit
            head = name[:-1].rstrip()
            if _BRACKETED.match(head):
                return text, None  # "(dI/dV)/(I/V)": a ratio, no unit
            name = head
        if name:
            return restored(name), restored(match.group("unit")) or None
    if slash_unit:
        match = _UNIT_AFTER_SLASH.match(masked)
        if match:
            return restored(match.group("name")), restored(match.group("unit"))
    return text, None


def normalise_key(key: str) -> tuple[str, str | None]:
    """A header key → ``(snake_case key, unit in brackets or None)``; path separators kept."""
    name, unit = split_label(key)
    parts = [snake(part) for part in name.split("/")]
    return "/".join(part for part in parts if part), unit


# --- units of arrays ---------------------------------------------------------------------------

# Labels that mean "arbitrary units". pint would read "a.u." as atomic-mass-unit × year and
# "au" as the astronomical unit, so they are caught before pint sees them.
_ARBITRARY = {"au", "arb", "arbu", "arbunit", "arbunits", "arbitrary", "arbitraryunits"}

# The SI unit each physical dimension is stored in (DESIGN §2: SI inside).
_SI_BY_DIMENSION: dict[Any, str] = {
    ureg.meter.dimensionality: "m",
    ureg.ampere.dimensionality: "A",
    ureg.volt.dimensionality: "V",
    ureg.hertz.dimensionality: "Hz",
    ureg.second.dimensionality: "s",
    ureg.newton.dimensionality: "N",
    ureg.siemens.dimensionality: "S",
    ureg.watt.dimensionality: "W",
    ureg.pascal.dimensionality: "Pa",
    ureg.coulomb.dimensionality: "C",
    ureg.farad.dimensionality: "F",
    ureg.ohm.dimensionality: "ohm",
    ureg.tesla.dimensionality: "T",
    (ureg.newton / ureg.meter).dimensionality: "N/m",
}

_SI_SYMBOLS = {"m", "A", "V", "Hz", "s", "N", "S", "W", "Pa", "C", "F", "ohm", "T", "N/m", "K"}


def arbitrary_unit(unit: str) -> bool:
    """True for the ways of writing "arbitrary units" ("a.u.", "arb. units", "au")."""
    return re.sub(r"[\s._]", "", unit.lower()) in _ARBITRARY


def si_scale(unit: str | None) -> tuple[float, str] | None:
    """``(factor, si_symbol)`` that turns values in ``unit`` into SI, or None when there is
    no such linear map (unknown unit, arbitrary units, an offset temperature, a dimension
    labbook has no SI symbol for). ``si_scale("pA")`` → ``(1e-12, "A")``."""
    if unit is None:
        return None
    text = unit.strip()
    if not text or arbitrary_unit(text):
        return None
    if text in _SI_SYMBOLS:
        return 1.0, text
    try:
        parsed = ureg.parse_units(text)
    except Exception:  # noqa: BLE001 - pint raises many types for text that is not a unit
        return None
    if parsed.dimensionality == ureg.kelvin.dimensionality:
        # Only an absolute scale converts by a factor; degC/degF have an offset.
        try:
            return float(ureg.Quantity(1.0, parsed).to("kelvin").magnitude), "K"
        except pint.errors.OffsetUnitCalculusError:
            return None
    symbol = _SI_BY_DIMENSION.get(parsed.dimensionality)
    if symbol is None:
        return None
    try:
        factor = float(ureg.Quantity(1.0, parsed).to(symbol).magnitude)
    except (pint.errors.PintError, ValueError):
        return None
    return (factor, symbol) if math.isfinite(factor) and factor != 0 else None


def to_si(values: np.ndarray, unit: str | None) -> tuple[np.ndarray, str]:
    """Convert an array to SI when its unit allows; otherwise return it with the unit as given.

    ``to_si(array_in_pA, "pA")`` → ``(array × 1e-12, "A")``; ``"a.u."`` or an unknown unit
    keeps the values and the label (the unit is never lost, only not converted).
    """
    scale = si_scale(unit)
    if scale is None:
        return values, (unit or "").strip()
    factor, symbol = scale
    if factor != 1.0:
        # Python-float scaling keeps float32 arrays in float32 (NEP 50).
        values = values * factor
    return values, symbol


_AXIS_SUFFIX = {"V": "v", "m": "m", "s": "s", "Hz": "hz", "A": "a", "K": "k"}


def axis_name(name: str, unit: str) -> str:
    """Canonical name of an axis: a voltage axis is ``bias_v``; others get their unit suffix
    (``x`` in m → ``x_m``, ``z`` → ``z_m``, ``time`` in s → ``time_s``)."""
    base = snake(name) or "axis"
    if unit == "V":
        return "bias_v"
    suffix = _AXIS_SUFFIX.get(unit)
    if suffix is None or base.endswith(f"_{suffix}"):
        return base
    return f"{base}_{suffix}"


# --- JSON-safe values --------------------------------------------------------------------------


def jsonable(value: Any, *, max_items: int = 256, max_chars: int = 65536, _depth: int = 0) -> Any:
    """Turn a header value into plain JSON: numpy scalars → float/int, bytes → str, small
    arrays → lists, big arrays → a summary, NaN/±inf → "nan"/"inf" strings (PostgreSQL's
    jsonb refuses NaN), anything else → its ``str``. Never raises."""
    if _depth > 16:
        return str(value)[:max_chars]
    if value is None or isinstance(value, bool | str):
        return value if not isinstance(value, str) else value[:max_chars]
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        number = float(value)
        return number if math.isfinite(number) else str(number)
    if isinstance(value, complex | np.complexfloating):
        return str(value)
    if isinstance(value, bytes | bytearray | memoryview | np.bytes_):
        return bytes(value)[:max_chars].decode("utf-8", errors="replace")
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, np.ndarray):
        # Object arrays are h5py's variable-length strings; records (void) are summarised.
        if value.dtype.kind == "V" or value.size > max_items:
            return {"shape": list(value.shape), "dtype": str(value.dtype)}
        return jsonable(value.tolist(), max_items=max_items, max_chars=max_chars, _depth=_depth + 1)
    if isinstance(value, Mapping):
        out: dict[str, Any] = {}
        for index, (key, item) in enumerate(value.items()):
            if index >= max_items:
                out["…"] = f"{len(value) - max_items} more"
                break
            out[str(jsonable(key, _depth=_depth + 1))] = jsonable(
                item, max_items=max_items, max_chars=max_chars, _depth=_depth + 1
            )
        return out
    if isinstance(value, list | tuple | set | frozenset):
        items = list(value)
        out_list = [
            jsonable(item, max_items=max_items, max_chars=max_chars, _depth=_depth + 1)
            for item in items[:max_items]
        ]
        if len(items) > max_items:
            out_list.append(f"… {len(items) - max_items} more")
        return out_list
    return str(value)[:max_chars]


# --- value parsers -----------------------------------------------------------------------------


class _Skip(ValueError):
    """A value that cannot be used: the message becomes a warning."""


# "5 mV rms", "10 mVpp", "50 pm (peak)", "rms 5 mV": the kind word is cut off before pint.
_KIND_WORDS = (
    r"peak[\s_-]*to[\s_-]*peak|p[\s-]?p|ptp|p2p|zero[\s_-]*to[\s_-]*peak|0[\s-]?p|rms|peak|pk"
)
# The word follows a separator, or is glued to the unit's last letter ("mVpp", "mVrms").
_KIND_AT_END = re.compile(rf"(?:[\s_(\[-]+|(?<=[A-Za-z]))({_KIND_WORDS})[)\]]?\s*$", re.IGNORECASE)
_KIND_AT_START = re.compile(rf"^\s*({_KIND_WORDS})\b[\s:]*", re.IGNORECASE)
_NUMBER = re.compile(r"\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*")


def _kind_word(word: str) -> str:
    word = re.sub(r"[\s_-]", "", word.lower())
    if word == "rms":
        return "rms"
    if word in {"peaktopeak", "pp", "ptp", "p2p"}:
        return "peak-to-peak"
    return "peak"  # peak, pk, zero-to-peak, 0-p


def _split_kind(text: str, *, unit_only: bool = False) -> tuple[str, str | None]:
    """``"5 mV rms"`` → ``("5 mV", "rms")``; with ``unit_only`` ``"mV rms"`` → ``("mV", "rms")``."""
    match = _KIND_AT_END.search(text)
    if match:
        stripped = text[: match.start()].rstrip()
        if unit_only or re.search(r"\d", stripped):
            return stripped, _kind_word(match.group(1))
    match = _KIND_AT_START.match(text)
    if match:
        return text[match.end() :], _kind_word(match.group(1))
    return text, None


def _as_text(value: Any) -> Any:
    if isinstance(value, bytes | bytearray | np.bytes_):
        return bytes(value).decode("utf-8", errors="replace")
    if isinstance(value, np.ndarray) and value.size == 1:
        return _as_text(value.reshape(()).item())
    if isinstance(value, np.generic):
        return value.item()
    return value


def _quantity(value: Any, unit: str | None, target: str, field: str) -> float:
    """One number in ``target`` from a value and an optional separately stated unit."""
    value = _as_text(value)
    if isinstance(value, bool):
        raise _Skip(f"{field}: {value!r} is not a number")
    if isinstance(value, int | float) and unit:
        if not math.isfinite(float(value)):
            raise _Skip(f"{field}: {value!r} is not a finite number")
        value = f"{float(value)!r} {unit}"
    elif isinstance(value, str) and unit and _NUMBER.fullmatch(value):
        value = f"{value.strip()} {unit}"
    if isinstance(value, list | tuple) and len(value) == 1:
        return _quantity(value[0], unit, target, field)
    try:
        return parse_quantity(value, target, field=field)
    except QuantityError as exc:
        raise _Skip(str(exc)) from exc


_PAIR_SPLIT = re.compile(r"\s*(?:[x×*,;]|\bby\b)\s*", re.IGNORECASE)
_TIMES_TEN = re.compile(r"(?<=\d)\s*[x×·*]\s*10\s*(?:\^|\*\*)\s*(?P<exp>[+-]?\d+)")


def _pair(value: Any, unit: str | None, target: str, field: str) -> list[float]:
    """``[x, y]`` from "20 nm", "20 nm x 10 nm", "20x10 nm", [2e-8, 1e-8], "[20, 10] nm"."""
    value = _as_text(value)
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, list | tuple):
        if len(value) == 1:
            value = value[0]
        elif len(value) == 2:
            return [_quantity(item, unit, target, field) for item in value]
        else:
            raise _Skip(f"{field}: expected one or two values, got {len(value)}")
    if isinstance(value, str):
        text = _TIMES_TEN.sub(lambda m: "e" + m.group("exp"), value.strip())
        bracket = re.match(r"^[\[(]\s*(?P<inner>[^\])]*)[\])]\s*(?P<unit>.*)$", text)
        if bracket:
            text = bracket.group("inner")
            unit = bracket.group("unit").strip() or unit
        parts = [part for part in _PAIR_SPLIT.split(text) if part]
        if len(parts) == 2:
            first, second = parts
            if unit is None:
                # "20x10 nm": the unit written once at the end applies to both numbers.
                tail = re.match(r"^[+-]?[\d.]+(?:e[+-]?\d+)?\s*(?P<unit>.*)$", second, re.I)
                if tail and tail.group("unit") and not re.search(r"[A-Za-zµμ]", first):
                    first = f"{first} {tail.group('unit')}"
            return [_quantity(first, unit, target, field), _quantity(second, unit, target, field)]
        if len(parts) != 1:
            raise _Skip(f"{field}: cannot read {value!r} as one size or an x, y pair")
        value = parts[0]
    single = _quantity(value, unit, target, field)
    return [single, single]


def _integer(value: Any, field: str) -> int:
    value = _as_text(value)
    if isinstance(value, str):
        value = value.strip()
        if not re.fullmatch(r"[+-]?\d+(?:\.0*)?", value):
            raise _Skip(f"{field}: {value!r} is not a whole number")
        value = float(value)
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise _Skip(f"{field}: {value!r} is not a whole number")
    if not math.isfinite(value) or value != int(value):
        raise _Skip(f"{field}: {value!r} is not a whole number")
    return int(value)


def _pixels(value: Any, field: str) -> list[int]:
    value = _as_text(value)
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, str):
        text = value.strip().strip("[]()")
        parts = [part for part in _PAIR_SPLIT.split(text) if part]
        if len(parts) not in (1, 2):
            raise _Skip(f"{field}: cannot read {value!r} as pixels (e.g. '256 x 256')")
        value = parts
    if isinstance(value, list | tuple):
        if len(value) == 1:
            value = value[0]
        elif len(value) == 2:
            return [_integer(value[0], field), _integer(value[1], field)]
        else:
            raise _Skip(f"{field}: expected one or two pixel counts, got {len(value)}")
    count = _integer(value, field)
    return [count, count]


def _text(value: Any, field: str) -> str:
    value = _as_text(value)
    if isinstance(value, list | tuple | np.ndarray) and len(value) == 1:
        value = _as_text(value[0])
    if isinstance(value, int | float) and not isinstance(value, bool):
        return str(value)
    if not isinstance(value, str) or not value.strip():
        raise _Skip(f"{field}: expected a name, got {value!r}")
    return value.strip()[:200]


def _reference(value: Any, field: str) -> int | str:
    """instrument/sample/tip: an id (int) or a name, as the file says; ingestion resolves it."""
    value = _as_text(value)
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    return _text(value, field)


def _mode(value: Any, field: str) -> str:
    text = snake(_text(value, field))
    if text in {"cc", "i", "constant_i"} or "current" in text:
        return "constant-current"
    if text in {"ch", "z", "constant_z", "feedback_off", "open_loop"} or "height" in text:
        return "constant-height"
    if "frequency" in text or text in {"df", "delta_f", "constant_df", "constant_delta_f"}:
        return "constant-frequency-shift"
    return text.replace("_", "-")


def _convention(value: Any, field: str) -> str:
    text = snake(_text(value, field))
    if "sample" in text:
        return "sample"
    if "tip" in text:
        return "tip"
    raise _Skip(f"{field}: {value!r} names neither the sample nor the tip")


def _amplitude_kind(value: Any, field: str) -> str:
    text = _text(value, field).strip().strip("()[]")
    if not re.fullmatch(rf"(?:{_KIND_WORDS})", text, re.IGNORECASE):
        raise _Skip(f"{field}: {value!r} is not rms, peak or peak-to-peak")
    return _kind_word(text)


def _direction(value: Any, field: str) -> str:
    text = snake(_text(value, field))
    for word, canonical in (
        ("both", "both"),
        ("forward", "forward"),
        ("backward", "backward"),
        ("up", "forward"),
        ("down", "backward"),
    ):
        if word in text:
            return canonical
    return text


# Dates as instrument PCs write them, beyond ISO 8601.
_DATE_FORMATS = (
    "%Y-%m-%d %H:%M:%S",
    "%Y-%m-%d %H:%M",
    "%Y/%m/%d %H:%M:%S",
    "%d.%m.%Y %H:%M:%S",
    "%d.%m.%Y %H:%M",
)
# Plausible acquisition epochs (Unix seconds): 1990-01-01 .. 2100-01-01.
_EPOCH_RANGE = (631152000.0, 4102444800.0)


def _time_zone(value: Any) -> tzinfo | None:
    text = str(_as_text(value)).strip()
    if text.upper() in {"UTC", "Z", "GMT"}:
        return UTC
    match = re.fullmatch(r"(?:UTC|GMT)?\s*([+-])(\d{1,2}):?(\d{2})?", text, re.IGNORECASE)
    if match:
        sign = 1 if match.group(1) == "+" else -1
        offset = timedelta(hours=int(match.group(2)), minutes=int(match.group(3) or 0))
        return timezone(sign * offset)
    try:
        return ZoneInfo(text)
    except (ZoneInfoNotFoundError, ValueError):
        return None


def _datetime(value: Any, field: str) -> tuple[datetime, bool]:
    """``(aware datetime, had_zone)``: a time written without a zone comes back in UTC with
    ``had_zone`` False, so the caller can apply the header's zone instead."""
    value = _as_text(value)
    if isinstance(value, int | float) and not isinstance(value, bool):
        if not _EPOCH_RANGE[0] <= float(value) <= _EPOCH_RANGE[1]:
            raise _Skip(f"{field}: {value!r} is not a plausible Unix time of an acquisition")
        return datetime.fromtimestamp(float(value), tz=UTC), True
    if isinstance(value, datetime):
        moment = value
    elif isinstance(value, str):
        text = value.strip()
        try:
            moment = datetime.fromisoformat(text)
        except ValueError:
            for fmt in _DATE_FORMATS:
                try:
                    # These layouts carry no zone: UTC here, the header's zone applied later.
                    return datetime.strptime(text, fmt).replace(tzinfo=UTC), False
                except ValueError:
                    continue
            raise _Skip(f"{field}: cannot read {value!r} as a date and time") from None
    else:
        raise _Skip(f"{field}: cannot read {value!r} as a date and time")
    if moment.tzinfo is None or moment.utcoffset() is None:
        return moment.replace(tzinfo=UTC), False
    return moment.astimezone(UTC), True


# --- the field table ---------------------------------------------------------------------------

Parser = Callable[[Any, "str | None", str], dict[str, Any]]


def _q(field: str, unit: str) -> Parser:
    return lambda value, given, key: {field: _quantity(value, given, unit, field)}


def _q_with_kind(field: str, kind_field: str, unit: str, default_kind: str | None = None) -> Parser:
    def parse(value: Any, given: str | None, key: str) -> dict[str, Any]:
        value = _as_text(value)
        kind = default_kind
        if isinstance(value, str):
            value, said = _split_kind(value)
            kind = said or kind
        if given:
            cut, said = _split_kind(given, unit_only=True)
            if said:
                given, kind = (cut.strip() or None), said
        out: dict[str, Any] = {field: _quantity(value, given, unit, field)}
        if kind:
            out[kind_field] = kind
        return out

    return parse


def _pair_parser(field: str, unit: str) -> Parser:
    return lambda value, given, key: {field: _pair(value, given, unit, field)}


def _one_of_pair(field: str, index: int, unit: str) -> Parser:
    return lambda value, given, key: {f"_{field}_{index}": _quantity(value, given, unit, field)}


def _plain(field: str, parse: Callable[[Any, str], Any]) -> Parser:
    return lambda value, given, key: {field: parse(value, field)}


def _bias(convention: str | None) -> Parser:
    def parse(value: Any, given: str | None, key: str) -> dict[str, Any]:
        out: dict[str, Any] = {"bias_v": _quantity(value, given, "volt", "bias_v")}
        if convention:
            out["bias_sign_convention"] = convention
        return out

    return parse


def _setpoint(value: Any, given: str | None, key: str) -> dict[str, Any]:
    # A "setpoint" in an nc-AFM header is a frequency shift; its unit tells which one it is.
    try:
        return {"setpoint_a": _quantity(value, given, "ampere", "setpoint_a")}
    except _Skip:
        try:
            return {"frequency_shift_hz": _quantity(value, given, "hertz", "frequency_shift_hz")}
        except _Skip:
            pass
        raise


def _acquired(value: Any, given: str | None, key: str) -> dict[str, Any]:
    moment, zoned = _datetime(value, "acquired_at")
    return {"acquired_at": moment, "_acquired_zoned": zoned, "_acquired_raw": value}


@dataclass(frozen=True)
class _Spec:
    parse: Parser
    rank: int  # 0 canonical name, 1 specific alias, 2 generic word: lower wins


def _table() -> dict[str, _Spec]:
    table: dict[str, _Spec] = {}

    def add(parse: Parser, canonical: Iterable[str], specific: Iterable[str] = (), generic=()):
        for rank, names in ((0, canonical), (1, specific), (2, generic)):
            for name in names:
                table[name] = _Spec(parse, rank)

    add(
        _acquired,
        ["acquired_at"],
        [
            "acquisition_time",
            "acquisition_start",
            "start_time",
            "date_time",
            "datetime",
            "timestamp",
            "recorded_at",
            "measured_at",
            "entry_start_time",
        ],
    )
    add(
        _bias("sample"),
        [],
        ["sample_bias", "sample_bias_v", "sample_voltage", "bias_sample", "v_sample"],
    )
    add(_bias("tip"), [], ["tip_bias", "tip_bias_v", "tip_voltage", "bias_tip", "v_tip"])
    add(
        _bias(None),
        ["bias_v"],
        ["bias", "bias_voltage", "v_bias", "gap_voltage", "bias_setpoint", "tunnel_voltage"],
    )
    add(
        _plain("bias_sign_convention", _convention),
        ["bias_sign_convention"],
        ["bias_convention", "bias_applied_to", "bias_reference", "bias_sign"],
    )
    add(
        _setpoint,
        ["setpoint_a"],
        [
            "current_setpoint",
            "setpoint_current",
            "i_set",
            "iset",
            "tunnel_current",
            "tunneling_current",
            "tunnelling_current",
            "feedback_setpoint",
            "stabilisation_current",
            "stabilization_current",
            "i_stab",
            "set_current",
        ],
        ["setpoint"],
    )
    add(
        _q("stabilisation_bias_v", "volt"),
        ["stabilisation_bias_v"],
        [
            "stabilisation_bias",
            "stabilization_bias",
            "stabilisation_voltage",
            "stabilization_voltage",
            "v_set",
            "vset",
            "v_stab",
            "set_bias",
            "setpoint_bias",
        ],
    )
    add(
        _pair_parser("scan_size_m", "meter"),
        ["scan_size_m"],
        ["scan_size", "scan_range", "scan_area", "image_size", "frame_size", "field_of_view"],
        ["size"],
    )
    add(
        _one_of_pair("scan_size_m", 0, "meter"),
        ["scan_size_x_m"],
        ["scan_size_x", "scan_width", "scan_range_x", "size_x", "x_size", "range_x", "width"],
    )
    add(
        _one_of_pair("scan_size_m", 1, "meter"),
        ["scan_size_y_m"],
        ["scan_size_y", "scan_height", "scan_range_y", "size_y", "y_size", "range_y", "height"],
    )
    add(
        lambda value, given, key: {"pixels": _pixels(value, "pixels")},
        ["pixels"],
        ["pixels_xy", "image_pixels", "resolution", "pixel_count", "frame_pixels"],
    )
    add(
        lambda value, given, key: {"_pixels_0": _integer(value, "pixels")},
        ["pixels_x"],
        ["pixels_per_line", "samples_per_line", "points_per_line", "x_pixels", "nx", "columns"],
    )
    add(
        lambda value, given, key: {"_pixels_1": _integer(value, "pixels")},
        ["pixels_y"],
        ["lines", "lines_per_frame", "number_of_lines", "y_pixels", "ny", "rows"],
    )
    add(
        _q("angle_deg", "degree"),
        ["angle_deg"],
        ["scan_angle", "scan_rotation", "rotation", "scan_angle_deg"],
        ["angle"],
    )
    add(
        _q("temperature_k", "kelvin"),
        ["temperature_k"],
        [
            "sample_temperature",
            "stm_temperature",
            "head_temperature",
            "scanner_temperature",
            "microscope_temperature",
            "t_sample",
        ],
        ["temperature"],
    )
    add(_plain("channel_name", _text), ["channel_name"], ["signal_name", "channel"])
    add(
        _plain("mode", _mode),
        ["mode"],
        ["scan_mode", "feedback_mode", "acquisition_mode", "imaging_mode", "operating_mode"],
    )
    add(
        _q_with_kind("lockin_amplitude_v", "lockin_amplitude_kind", "volt"),
        ["lockin_amplitude_v"],
        [
            "lockin_amplitude",
            "lockin_modulation_amplitude",
            "lockin_modulation",
            "modulation_amplitude",
            "bias_modulation",
            "modulation_voltage",
            "v_mod",
            "vmod",
            "lockin_amplifier_amplitude",
        ],
    )
    add(
        _q_with_kind("lockin_amplitude_v", "lockin_amplitude_kind", "volt", "rms"),
        [],
        ["lockin_amplitude_rms", "modulation_amplitude_rms", "v_mod_rms", "lockin_amplitude_v_rms"],
    )
    add(
        _q_with_kind("lockin_amplitude_v", "lockin_amplitude_kind", "volt", "peak"),
        [],
        [
            "lockin_amplitude_peak",
            "lockin_amplitude_pk",
            "modulation_amplitude_peak",
            "v_mod_peak",
            "lockin_amplitude_v_peak",
        ],
    )
    add(
        _plain("lockin_amplitude_kind", _amplitude_kind),
        ["lockin_amplitude_kind"],
        ["lockin_amplitude_type", "modulation_kind", "modulation_amplitude_kind", "lockin_kind"],
    )
    add(
        _q("lockin_frequency_hz", "hertz"),
        ["lockin_frequency_hz"],
        [
            "lockin_frequency",
            "lockin_modulation_frequency",
            "lockin_reference_frequency",
            "modulation_frequency",
            "reference_frequency",
            "f_mod",
            "fmod",
        ],
    )
    add(
        _q("lockin_time_constant_s", "second"),
        ["lockin_time_constant_s"],
        ["lockin_time_constant", "lockin_tc", "time_constant", "lockin_integration_time"],
    )
    add(
        _q("lockin_phase_deg", "degree"),
        ["lockin_phase_deg"],
        ["lockin_phase", "reference_phase", "lockin_reference_phase"],
    )
    add(
        lambda value, given, key: {"lockin_harmonic": _integer(value, "lockin_harmonic")},
        ["lockin_harmonic"],
        ["harmonic", "lockin_demodulation_harmonic"],
    )
    add(
        _q("sweep_start_v", "volt"),
        ["sweep_start_v"],
        ["sweep_start", "sweep_from", "bias_start", "start_bias", "v_start", "start_voltage"],
    )
    add(
        _q("sweep_end_v", "volt"),
        ["sweep_end_v"],
        [
            "sweep_end",
            "sweep_stop",
            "sweep_to",
            "bias_end",
            "bias_stop",
            "end_bias",
            "stop_bias",
            "v_end",
            "end_voltage",
        ],
    )
    add(
        lambda value, given, key: {"sweep_points": _integer(value, "sweep_points")},
        ["sweep_points"],
        ["n_points", "num_points", "number_of_points", "npoints", "sweep_point_count"],
        ["points"],
    )
    add(_q("sweep_dwell_s", "second"), ["sweep_dwell_s"], ["dwell", "dwell_time", "sweep_dwell"])
    add(
        lambda value, given, key: {"sweep_repeats": _integer(value, "sweep_repeats")},
        ["sweep_repeats"],
        ["repeats", "repetitions", "sweep_count", "sweeps"],
    )
    add(_plain("sweep_direction", _direction), ["sweep_direction"], ["direction"])
    add(_q("z_offset_m", "meter"), ["z_offset_m"], ["z_offset", "dz_offset", "delta_z"])
    add(
        _q("frequency_shift_hz", "hertz"),
        ["frequency_shift_hz"],
        [
            "frequency_shift",
            "frequency_shift_setpoint",
            "freq_shift",
            "delta_f",
            "df_setpoint",
            "sensor_frequency_shift",
            "df",
        ],
    )
    add(
        _q_with_kind("oscillation_amplitude_m", "oscillation_amplitude_kind", "meter"),
        ["oscillation_amplitude_m"],
        ["oscillation_amplitude", "a_osc", "amplitude_setpoint", "sensor_amplitude"],
        ["amplitude"],
    )
    add(
        _q_with_kind("oscillation_amplitude_m", "oscillation_amplitude_kind", "meter", "peak"),
        [],
        ["oscillation_amplitude_peak", "oscillation_amplitude_pk"],
    )
    add(
        _q_with_kind(
            "oscillation_amplitude_m", "oscillation_amplitude_kind", "meter", "peak-to-peak"
        ),
        [],
        [
            "oscillation_amplitude_pp",
            "oscillation_amplitude_peak_to_peak",
            "oscillation_amplitude_p2p",
        ],
    )
    add(
        _plain("oscillation_amplitude_kind", _amplitude_kind),
        ["oscillation_amplitude_kind"],
        ["amplitude_kind", "oscillation_amplitude_type"],
    )
    add(
        _q("sensor_resonance_hz", "hertz"),
        ["sensor_resonance_hz"],
        [
            "sensor_resonance",
            "sensor_resonance_frequency",
            "resonance_frequency",
            "cantilever_resonance",
            "free_resonance",
            "eigenfrequency",
            "f0",
            "sensor_f0",
        ],
        ["resonance"],
    )
    add(
        _q("sensor_stiffness_n_per_m", "newton / meter"),
        ["sensor_stiffness_n_per_m"],
        [
            "sensor_stiffness",
            "sensor_spring_constant",
            "spring_constant",
            "cantilever_stiffness",
            "stiffness",
        ],
        ["k"],
    )
    add(
        lambda value, given, key: {
            "sensor_quality_factor": _quantity(
                value, given, "dimensionless", "sensor_quality_factor"
            )
        },
        ["sensor_quality_factor"],
        ["quality_factor", "q_factor", "sensor_q", "sensor_q_factor"],
        ["q"],
    )
    add(
        _q("line_time_s", "second"),
        ["line_time_s"],
        ["line_time", "time_per_line", "line_duration"],
    )
    add(_q("pressure_mbar", "millibar"), ["pressure_mbar"], ["pressure", "chamber_pressure"])
    add(
        _plain("instrument", _reference),
        ["instrument"],
        ["instrument_name", "instrument_id", "microscope"],
    )
    add(_plain("sample", _reference), ["sample"], ["sample_name", "sample_id"])
    add(_plain("tip", _reference), ["tip"], ["tip_name", "tip_id"])
    add(_plain("operator", _text), ["operator"], ["operator_name", "user", "experimenter"])
    add(_plain("kind", _text), ["kind"], ["data_kind", "measurement_kind"])
    return table


_TABLE = _table()

#: Every field :func:`normalise_metadata` can return (DESIGN §4 names and the acquisition
#: fields of FIELD §5), in the unit its name carries.
CANONICAL_FIELDS: frozenset[str] = frozenset(
    {
        "acquired_at",
        "bias_v",
        "bias_sign_convention",
        "setpoint_a",
        "stabilisation_bias_v",
        "scan_size_m",
        "pixels",
        "angle_deg",
        "temperature_k",
        "channel_name",
        "mode",
        "lockin_amplitude_v",
        "lockin_amplitude_kind",
        "lockin_frequency_hz",
        "lockin_time_constant_s",
        "lockin_phase_deg",
        "lockin_harmonic",
        "sweep_start_v",
        "sweep_end_v",
        "sweep_points",
        "sweep_dwell_s",
        "sweep_repeats",
        "sweep_direction",
        "z_offset_m",
        "frequency_shift_hz",
        "oscillation_amplitude_m",
        "oscillation_amplitude_kind",
        "sensor_resonance_hz",
        "sensor_stiffness_n_per_m",
        "sensor_quality_factor",
        "line_time_s",
        "pressure_mbar",
        "instrument",
        "sample",
        "tip",
        "operator",
        "kind",
    }
)

# Plausible ranges (inclusive) in the canonical unit: far wider than any real acquisition,
# narrow enough to catch a bare number in the wrong unit ("setpoint: 50" meant 50 pA).
_RANGES: dict[str, tuple[float, float]] = {
    "bias_v": (-1000.0, 1000.0),
    "stabilisation_bias_v": (-1000.0, 1000.0),
    "sweep_start_v": (-1000.0, 1000.0),
    "sweep_end_v": (-1000.0, 1000.0),
    "setpoint_a": (-1e-4, 1e-4),
    "angle_deg": (-360.0, 360.0),
    "temperature_k": (0.0, 3000.0),
    "lockin_amplitude_v": (0.0, 100.0),
    "lockin_frequency_hz": (0.0, 1e8),
    "lockin_time_constant_s": (0.0, 1e4),
    "lockin_phase_deg": (-360.0, 360.0),
    "sweep_dwell_s": (0.0, 1e4),
    "z_offset_m": (-1e-3, 1e-3),
    "frequency_shift_hz": (-1e6, 1e6),
    "oscillation_amplitude_m": (0.0, 1e-3),
    "sensor_resonance_hz": (0.0, 1e9),
    "sensor_stiffness_n_per_m": (0.0, 1e9),
    "sensor_quality_factor": (0.0, 1e9),
    "line_time_s": (0.0, 1e5),
    "pressure_mbar": (0.0, 2000.0),
}
_POSITIVE = {
    "temperature_k",
    "lockin_amplitude_v",
    "lockin_frequency_hz",
    "lockin_time_constant_s",
    "oscillation_amplitude_m",
    "sensor_resonance_hz",
    "sensor_stiffness_n_per_m",
    "sensor_quality_factor",
    "line_time_s",
    "pressure_mbar",
}
_SCAN_SIZE_RANGE = (0.0, 1e-2)  # up to 1 cm: the largest scanners reach a few hundred µm
_PIXELS_RANGE = (1, 1 << 20)
_INT_RANGES = {
    "sweep_points": (1, 1 << 30),
    "sweep_repeats": (1, 1 << 20),
    "lockin_harmonic": (1, 16),
}

# Context words of a parent group in a path key: its leaf is read in that context only, so
# "lockin/amplitude" is a lock-in amplitude and never an oscillation amplitude.
_CONTEXTS = (
    ("lockin", "lockin"),
    ("modulation", "lockin"),
    ("cantilever", "sensor"),
    ("sensor", "sensor"),
    ("oscillat", "sensor"),
    ("sample", "sample"),
    ("tip", "tip"),
    ("instrument", "instrument"),
)

# Common unit suffixes in key names ("bias_mv", "setpoint_pa", "size_nm").
_KEY_UNIT_SUFFIXES = {
    "mv": "mV",
    "uv": "uV",
    "v": "V",
    "pa": "pA",  # a setpoint in pA; a pressure key in Pa is special-cased below
    "na": "nA",
    "ua": "uA",
    "fa": "fA",
    "a": "A",
    "pm": "pm",
    "nm": "nm",
    "um": "um",
    "m": "m",
    "hz": "Hz",
    "khz": "kHz",
    "mhz": "MHz",
    "ms": "ms",
    "us": "us",
    "s": "s",
    "k": "K",
    "deg": "degree",
    "mbar": "mbar",
}


def _candidates(key: str) -> list[tuple[str, str | None]]:
    """Names to look up for a (path) key, best first, each with a unit found in the name."""
    parts = key.split("/")
    leaf = parts[-1]
    names: list[str] = []
    if len(parts) > 1:
        parent = parts[-2]
        context = next((ctx for word, ctx in _CONTEXTS if word in parent), None)
        if context and not leaf.startswith(context):
            names.append(f"{context}_{leaf}")
        names.append(f"{parent}_{leaf}")
        if context in (None, "sample", "instrument", "tip"):
            names.append(leaf)
    else:
        names.append(leaf)
    out: list[tuple[str, str | None]] = [(name, None) for name in names]
    for name in names:
        head, _, suffix = name.rpartition("_")
        if head and suffix in _KEY_UNIT_SUFFIXES:
            unit = _KEY_UNIT_SUFFIXES[suffix]
            out.append((head, "Pa" if suffix == "pa" and "pressure" in head else unit))
    return out


def _check_range(field: str, value: Any) -> str | None:
    if field == "scan_size_m":
        low, high = _SCAN_SIZE_RANGE
        if not all(low < item <= high for item in value):
            return f"scan_size_m: {value!r} m is not a plausible scan size (0 < size ≤ 1 cm)"
    elif field == "pixels":
        low, high = _PIXELS_RANGE
        if not all(low <= item <= high for item in value):
            return f"pixels: {value!r} is not a plausible pixel count"
    elif field in _INT_RANGES:
        low, high = _INT_RANGES[field]
        if not low <= value <= high:
            return f"{field}: {value!r} is outside {low}..{high}"
    elif field in _RANGES:
        low, high = _RANGES[field]
        if not low <= value <= high or (field in _POSITIVE and value <= 0):
            return (
                f"{field}: {value!r} is not plausible (expected {low:g}..{high:g} in the "
                "field's unit; a bare number is read in that unit)"
            )
    return None


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, float) and isinstance(b, float):
        return math.isclose(a, b, rel_tol=1e-9, abs_tol=0.0)
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        return all(_same(x, y) for x, y in zip(a, b, strict=True))
    return a == b


def normalise_metadata(
    header: Mapping[str, Any],
    *,
    units: Mapping[str, str] | None = None,
    source: str = "header",
) -> tuple[dict[str, Any], list[str]]:
    """Map a flat header onto labbook's metadata fields; return ``(metadata, warnings)``.

    ``header`` keys may be paths (``entry/sample/temperature``), carry a unit in brackets
    (``"Bias (mV)"``) or a unit suffix (``bias_mv``); ``units`` gives a unit stated apart
    from the value (an HDF5 ``units`` attribute) by the same key. Values may be numbers
    (read in the unit stated, else the field's own unit), strings with units, lists, numpy
    scalars or bytes. Keys that name no field are ignored (the caller keeps them in the raw
    header). When two keys give the same field, the more specific name wins (a canonical
    name over an alias over a generic word such as "temperature"); disagreeing values are
    reported. ``source`` prefixes the warnings ("header", "sidecar", "upload metadata").

    Lock-in amplitudes given peak-to-peak are stored as peak (half the value), because the
    lock-in kind is "rms" or "peak"; oscillation amplitudes keep "peak-to-peak" as a kind.
    A time without a zone is read in the header's ``time_zone`` if it has one, else UTC,
    with a warning.
    """
    units = units or {}
    chosen: dict[str, tuple[int, str, Any]] = {}
    warnings: list[str] = []
    time_zone_value: Any = None
    date_value: Any = None
    time_value: Any = None

    for raw_key, value in header.items():
        key, bracket_unit = normalise_key(str(raw_key))
        if not key:
            continue
        leaf = key.rsplit("/", 1)[-1]
        if leaf in {"time_zone", "timezone", "tz", "utc_offset"}:
            time_zone_value = value
            continue
        if leaf == "date":
            date_value = value
        elif leaf == "time":
            time_value = value
        given_unit = units.get(raw_key) or bracket_unit
        for name, name_unit in _candidates(key):
            spec = _TABLE.get(name)
            if spec is None:
                continue
            try:
                values = spec.parse(value, given_unit or name_unit, str(raw_key))
            except _Skip as exc:
                warnings.append(f"{source}: {raw_key!r}: {exc}")
                break
            except Exception as exc:  # noqa: BLE001 - a header value must never crash a read
                warnings.append(f"{source}: {raw_key!r}: cannot read {value!r} ({exc})")
                break
            _choose(chosen, values, spec.rank, str(raw_key), warnings, source)
            break

    out = {field: value for field, (_, _, value) in chosen.items()}
    _combine_pairs(out, "scan_size_m", warnings, source)
    _combine_pairs(out, "pixels", warnings, source)

    if "acquired_at" not in out and date_value is not None and time_value is not None:
        try:
            moment, zoned = _datetime(f"{_as_text(date_value)} {_as_text(time_value)}", "date")
            out.update(acquired_at=moment, _acquired_zoned=zoned, _acquired_raw=None)
        except _Skip:
            warnings.append(f"{source}: cannot read date {date_value!r} and time {time_value!r}")
    if "acquired_at" in out and not out.pop("_acquired_zoned", True):
        raw = out.pop("_acquired_raw", None)
        zone = _time_zone(time_zone_value) if time_zone_value is not None else None
        naive = out["acquired_at"].replace(tzinfo=None)
        if zone is not None:
            out["acquired_at"] = naive.replace(tzinfo=zone).astimezone(UTC)
        else:
            if time_zone_value is not None:
                warnings.append(f"{source}: time_zone {time_zone_value!r} is not a known zone")
            warnings.append(
                f"{source}: acquired_at {raw if raw is not None else naive.isoformat()!r} has no "
                "time zone; read as UTC"
            )
    out.pop("_acquired_zoned", None)
    out.pop("_acquired_raw", None)

    if out.get("lockin_amplitude_kind") == "peak-to-peak" and "lockin_amplitude_v" in out:
        # The lock-in kind is rms or peak: a peak-to-peak modulation is twice its peak.
        out["lockin_amplitude_v"] /= 2.0
        out["lockin_amplitude_kind"] = "peak"
    elif out.get("lockin_amplitude_kind") == "peak-to-peak":
        out["lockin_amplitude_kind"] = "peak"
        warnings.append(
            f"{source}: lockin_amplitude_kind is peak-to-peak but no amplitude was given"
        )

    kind = out.get("kind")
    if kind is not None:
        kind = snake(str(kind))
        kind = {"image": "topograph", "topography": "topograph", "current_image": "current"}.get(
            kind, kind
        )
        if kind not in {"topograph", "current", "spectrum", "grid", "other"}:
            warnings.append(f"{source}: kind {out['kind']!r} is not a labbook file kind")
            out.pop("kind")
        else:
            out["kind"] = kind

    for field in list(out):
        problem = _check_range(field, out[field])
        if problem:
            warnings.append(f"{source}: {problem}")
            del out[field]
    return out, warnings


def _choose(
    chosen: dict[str, tuple[int, str, Any]],
    values: dict[str, Any],
    rank: int,
    key: str,
    warnings: list[str],
    source: str,
) -> None:
    """Keep the values one key gave, unless a more specific key already gave the field.

    The first field a parser returns is the primary one (``bias_v``); its companions
    (``bias_sign_convention`` from "tip_bias") are kept only with it, so a refused bias never
    leaves its sign convention behind.
    """
    primary, *companions = values
    previous = chosen.get(primary)
    if previous is not None and previous[0] <= rank:
        if not primary.startswith("_") and not _same(previous[2], values[primary]):
            warnings.append(
                f"{source}: {primary}: {key!r} gives {jsonable(values[primary])!r}, "
                f"{previous[1]!r} gives {jsonable(previous[2])!r}; kept {previous[1]!r}"
            )
        return
    if (
        previous is not None
        and not primary.startswith("_")
        and not _same(previous[2], values[primary])
    ):
        warnings.append(
            f"{source}: {primary}: {key!r} gives {jsonable(values[primary])!r}, "
            f"{previous[1]!r} gives {jsonable(previous[2])!r}; kept {key!r} (more specific)"
        )
    chosen[primary] = (rank, key, values[primary])
    for field in companions:
        previous = chosen.get(field)
        if previous is None or previous[1] == key or previous[0] > rank:
            chosen[field] = (rank, key, values[field])
        elif not field.startswith("_") and not _same(previous[2], values[field]):
            warnings.append(
                f"{source}: {field}: {key!r} implies {values[field]!r}, "
                f"{previous[1]!r} gives {previous[2]!r}; kept {previous[1]!r}"
            )


def _combine_pairs(out: dict[str, Any], field: str, warnings: list[str], source: str) -> None:
    x, y = out.pop(f"_{field}_0", None), out.pop(f"_{field}_1", None)
    if x is None and y is None:
        return
    if field in out:
        stated = out[field]
        if (x is not None and not _same(stated[0], x)) or (
            y is not None and not _same(stated[1], y)
        ):
            warnings.append(
                f"{source}: {field}: the x/y keys ({x!r}, {y!r}) disagree with {stated!r}; "
                "kept the pair"
            )
        return
    if x is not None and y is not None:
        out[field] = [x, y]
    else:
        warnings.append(f"{source}: {field}: only one of x and y is given ({x!r}, {y!r})")


def loads_json_object(text: str | bytes, *, what: str, max_bytes: int) -> dict[str, Any]:
    """Parse a JSON object of at most ``max_bytes``; raise ``ValueError`` naming ``what``.

    Refuses NaN/Infinity literals (not JSON) and non-object documents.
    """
    if len(text) > max_bytes:
        raise ValueError(f"{what} is {len(text)} bytes, more than the limit of {max_bytes}")

    def refuse_constant(name: str) -> Any:
        raise ValueError(f"{what}: {name} is not valid JSON")

    def finite_float(literal: str) -> float:
        number = float(literal)
        if not math.isfinite(number):
            raise ValueError(f"{what}: {literal} overflows a float")
        return number

    try:
        value = json.loads(text, parse_constant=refuse_constant, parse_float=finite_float)
    except (ValueError, RecursionError) as exc:
        raise ValueError(f"{what} is not valid JSON: {exc}") from exc
    if not isinstance(value, dict):
        raise ValueError(f"{what} must be a JSON object, got {type(value).__name__}")
    return value
