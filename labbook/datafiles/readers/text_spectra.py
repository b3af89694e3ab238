"""Plain-text and CSV spectra: a header block of ``key: value`` (or ``# key = value``) lines,
then columns of numbers, the first (or the bias-like) column being the sweep axis.

The layout read (docs/readers.md has an example)::

    # a comment line: kept in the raw header
    # bias: 0.5 V                  <- "# key: value", "# key = value", "key: value", "key = value"
    setpoint = 50 pA
    Bias (V), Current (pA), LockIn X (V)    <- column names (also allowed as a "#" line)
    -1.000, -12.5, 0.0012
    ...

* **Columns** are separated by tabs, semicolons, commas or runs of spaces (found from the first
  data line). Units come from the column names — ``Bias (V)``, ``Current [pA]``,
  ``Bias/V`` — or a ``units`` header line (``units: V, pA, V``), and are converted to SI.
* **Decimal commas** ("0,5") are read when the columns are not separated by commas, or when
  the header says ``decimal: ,``.
* **Comment lines** start with ``#``, ``%`` or ``;`` (also between data lines); blank lines
  are skipped.
* The axis is the first column named like a bias (``bias``, ``V``, ``sample bias`` …; a
  ``tip bias`` column also sets the sign convention to "tip"), else the first column.

A data line with a missing or extra value, or text where a number belongs, is an error naming
the line (a file cut off mid-line is reported as "truncated", and so is one with fewer rows
than its header's sweep points).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

import numpy as np

from labbook.datafiles.readers import ElementBudget, ParsedFile, ReaderError, ReaderLimits, Source
from labbook.datafiles.readers.normalise import (
    axis_name,
    normalise_metadata,
    snake,
    split_label,
    to_si,
)

__all__ = ["read"]

_COMMENT = ("#", "%", ";", "//")
_KEY_VALUE = re.compile(r"^(?P<key>[A-Za-z_ΔδµμÅ][^:=]{0,79}?)\s*[:=]\s*(?P<value>.*)$")
_NUMBER = re.compile(
    r"^[+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?$|^[+-]?(?:nan|inf)$", re.I
)
_BIAS_COLUMNS = {
    "bias",
    "bias_v",
    "v",
    "voltage",
    "sample_bias",
    "bias_voltage",
    "v_bias",
    "u",
    "tip_bias",
    "bias_calc",
    "v_sample",
}
_MAX_COLUMNS = 256


def _decode(data: bytes) -> tuple[str, list[str]]:
    if b"\x00" in data:
        raise ReaderError("unsupported: the file has NUL bytes; it is binary data, not text")
    try:
        return data.decode("utf-8-sig"), []
    except UnicodeDecodeError:
        # Older instrument PCs write Windows-1252 ("µ", "°", "Å"); each byte then maps to a
        # character, so the text is read, with a warning that it was not UTF-8.
        return data.decode("cp1252", errors="replace"), ["the text is not UTF-8; read as cp1252"]


def _split(line: str, delimiter: str | None) -> list[str]:
    if delimiter is None:
        return line.split()
    return [cell.strip() for cell in line.split(delimiter)]


def _delimiter(line: str) -> str | None:
    """The column separator of a data line: tab, semicolon, comma, else whitespace (None)."""
    if "\t" in line:
        return "\t"
    if ";" in line:
        return ";"
    if "," in line:
        words = line.split()
        if len(words) > 1 and all(_NUMBER.match(word) for word in words):
            return None  # "1,5 2,5": decimal commas between spaces
        return ","
    return None


def _is_data(line: str) -> bool:
    cells = _split(line, _delimiter(line))
    return bool(cells) and all(_NUMBER.match(cell) for cell in cells)


def read(source: Source, given: Mapping[str, Any], limits: ReaderLimits) -> ParsedFile:
    if source.size > limits.max_text_bytes:
        raise ReaderError(
            f"too large: a text spectrum of {source.size:,} bytes is more than the "
            f"{limits.max_text_bytes:,} read as text; use HDF5, .npz or the exchange layout"
        )
    text, warnings = _decode(source.read_bytes())
    lines = text.splitlines()
    header: dict[str, Any] = {}
    comments: list[str] = []
    column_line: str | None = None
    last_comment: str | None = None
    start = None
    header_bytes = 0
    for number, line in enumerate(lines):
        stripped = line.strip()
        if not stripped:
            continue
        if _is_data(stripped):
            start = number
            break
        header_bytes += len(line)
        if header_bytes > limits.max_header_bytes:
            raise ReaderError(
                f"refused: the header block is longer than {limits.max_header_bytes:,} bytes "
                "with no column data"
            )
        is_comment = stripped.startswith(_COMMENT)
        body = stripped.lstrip("#%;/").strip() if is_comment else stripped
        match = _KEY_VALUE.match(body)
        if match:
            key = match.group("key").strip()
            if key in header:
                warnings.append(f"header key {key!r} appears twice; kept the first")
            else:
                header[key] = match.group("value").strip()
        elif is_comment:
            comments.append(body)
            last_comment = body
        elif column_line is None:
            column_line = stripped
        else:
            raise ReaderError(
                f"unsupported: line {number + 1} ({stripped[:60]!r}) is neither a header "
                "line, a comment, nor data"
            )
    if start is None:
        raise ReaderError("unsupported: the text has no columns of numbers (no data lines)")

    first = lines[start].strip()
    delimiter = _delimiter(first)
    stated_decimal = str(header.get("decimal", header.get("decimal_separator", ""))).strip()
    # A comma cannot be both the column separator and the decimal mark.
    decimal_comma = delimiter != "," and (
        stated_decimal == "," or any("," in cell for cell in _split(first, delimiter))
    )
    width = len(_split(first, delimiter))
    if width > _MAX_COLUMNS:
        raise ReaderError(f"refused: {width} columns; at most {_MAX_COLUMNS} are read")

    data_lines: list[tuple[int, str]] = []
    for number in range(start, len(lines)):
        stripped = lines[number].strip()
        if not stripped or stripped.startswith(_COMMENT):
            continue
        cells = _split(stripped, delimiter)
        if len(cells) != width:
            is_last = all(not line.strip() for line in lines[number + 1 :])
            problem = "truncated" if is_last and len(cells) < width else "corrupt"
            raise ReaderError(
                f"{problem}: line {number + 1} has {len(cells)} values, the data have {width} "
                "columns"
            )
        data_lines.append((number, stripped.replace(",", ".") if decimal_comma else stripped))
    ElementBudget(limits).claim((len(data_lines), width), what="the text columns")
    data = _numbers(data_lines, delimiter, width)

    labels = _labels(column_line or last_comment, header, width, delimiter)
    names, units = _names_units(labels, header, width)
    axis_index = next((i for i, name in enumerate(names) if name in _BIAS_COLUMNS), 0)
    if width < 2:
        raise ReaderError("unsupported: a spectrum needs an axis column and a data column")
    channels: dict[str, np.ndarray] = {}
    axes: dict[str, np.ndarray] = {}
    out_units: dict[str, str] = {}
    for index, name in enumerate(names):
        values, unit = to_si(np.ascontiguousarray(data[:, index]), units[index])
        if index == axis_index:
            canonical = axis_name(name, unit)
            axes[canonical] = values
            out_units[canonical] = unit
        else:
            channels[name] = values
            out_units[name] = unit

    metadata, problems = normalise_metadata(header, source="text header")
    warnings += problems
    metadata.pop("kind", None)
    if not text.endswith(("\n", "\r")):
        # A number cut mid-digits ("0.0012" → "0.") still reads; only the missing line break
        # tells, and hand-written files often lack one, so this is a warning.
        warnings.append("the file does not end with a line break: its last line may be cut short")
    stated = metadata.get("sweep_points")
    if stated is not None and data.shape[0] < stated:
        # Text has no length field: a header that promises more points than the file holds
        # is the only sign of a file cut off at a line boundary.
        raise ReaderError(
            f"truncated: the header says {stated} sweep points, the file holds {data.shape[0]} rows"
        )
    if names[axis_index] == "tip_bias" and "bias_sign_convention" not in metadata:
        metadata["bias_sign_convention"] = "tip"
    return ParsedFile(
        kind="spectrum",
        channels=channels,
        axes=axes,
        units=out_units,
        metadata=metadata,
        raw_header={
            "header": header,
            "comments": comments[:1000],
            "columns": labels,
            "delimiter": {None: "whitespace", "\t": "tab"}.get(delimiter, delimiter),
            "decimal": "," if decimal_comma else ".",
            "rows": int(data.shape[0]),
        },
        warnings=warnings,
    )


def _numbers(data_lines: list[tuple[int, str]], delimiter: str | None, width: int) -> np.ndarray:
    """The data lines as a (rows, columns) float64 array; numpy parses, and a line it
    refuses is found again here to name it."""
    try:
        data = np.loadtxt(
            [line for _, line in data_lines],
            delimiter=delimiter,
            dtype=np.float64,
            ndmin=2,
            comments=None,
        )
    except ValueError:
        for number, line in data_lines:
            try:
                [float(cell) for cell in _split(line, delimiter)]
            except ValueError as exc:
                raise ReaderError(
                    f"corrupt: line {number + 1} is not numbers ({line[:60]!r})"
                ) from exc
        raise ReaderError("corrupt: the columns could not be read as numbers") from None
    if data.shape != (len(data_lines), width):
        raise ReaderError(f"corrupt: read {data.shape} values for {len(data_lines)} × {width}")
    return data


def _labels(
    line: str | None, header: Mapping[str, Any], width: int, delimiter: str | None
) -> list[str]:
    listed = header.get("columns")
    if isinstance(listed, str):
        cells = [cell.strip() for cell in re.split(r"[,;\t]", listed) if cell.strip()]
        if len(cells) == width:
            return cells
    if line:
        for cells in (
            _split(line, delimiter),
            [cell for cell in re.split(r"\t|\s{2,}", line.strip()) if cell],
            line.split(),
        ):
            if len(cells) == width:
                return [cell.strip().strip('"') for cell in cells]
    return [f"column{index + 1}" for index in range(width)]


def _names_units(
    labels: list[str], header: Mapping[str, Any], width: int
) -> tuple[list[str], list[str | None]]:
    names: list[str] = []
    units: list[str | None] = []
    for index, label in enumerate(labels):
        name, unit = split_label(label, slash_unit=True)
        clean = snake(name) or f"column{index + 1}"
        while clean in names:
            clean = f"{clean}_{index + 1}"
        names.append(clean)
        units.append(unit)
    stated = header.get("units")
    if isinstance(stated, str):
        cells = [cell.strip() for cell in re.split(r"[,;\t]", stated)]
        if len(cells) == width:
            units = [unit or (cell or None) for unit, cell in zip(units, cells, strict=True)]
    return names, units
