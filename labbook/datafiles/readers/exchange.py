"""The labbook exchange layout: our own open container for one dataset (docs/exchange-format.md).

A ZIP archive (extension ``.lbx``) whose first member is ``labbook-exchange.json`` (stored,
uncompressed: its name at byte 30 of the file identifies the format), followed by one ``.npy``
member per channel and per axis. The manifest names the format and its version, the kind, every
array with its unit, shape, dtype and SHA-256, the normalised metadata (canonical field names,
SI values) and, optionally, the original header as found. Every tool that reads ZIP and
``.npy`` (Python's ``zipfile`` and numpy, or ``unzip``) can open it without labbook.

:func:`write_exchange` writes it (the demo and the tests use it); :func:`read` reads it with
the archive checks of ``numpy_arrays`` (names, nested archives, sizes, ratio) and verifies each
array's checksum.
"""

from __future__ import annotations

import hashlib
import io
import json
import re
import zipfile
from collections.abc import Mapping
from datetime import datetime
from typing import Any

import numpy as np

from labbook.datafiles.readers import (
    DEFAULT_LIMITS,
    EXCHANGE_MANIFEST,
    KINDS,
    ElementBudget,
    ParsedFile,
    ReaderError,
    ReaderLimits,
    Source,
)
from labbook.datafiles.readers.normalise import (
    CANONICAL_FIELDS,
    jsonable,
    loads_json_object,
    normalise_metadata,
    to_si,
)
from labbook.datafiles.readers.numpy_arrays import SafeArchive, open_archive

__all__ = ["FORMAT", "MANIFEST", "VERSION", "read", "write_exchange"]

MANIFEST = EXCHANGE_MANIFEST
FORMAT = "labbook-exchange"
#: The version this module writes. Readers accept every 1.x: a minor version only adds
#: optional manifest keys or members, which a 1.0 reader ignores (with a warning).
VERSION = "1.0"
_MAJOR = 1

_ARRAY_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_DTYPES = {"<f4": np.dtype("<f4"), "<f8": np.dtype("<f8")}
# Fixed member timestamps: the same dataset always gives the same bytes (and the same SHA-256
# in the content-addressed store).
_EPOCH = (1980, 1, 1, 0, 0, 0)


# --- writing -----------------------------------------------------------------------------------


def write_exchange(
    kind: str,
    channels: Mapping[str, Any],
    *,
    axes: Mapping[str, Any] | None = None,
    units: Mapping[str, str] | None = None,
    metadata: Mapping[str, Any] | None = None,
    header: Mapping[str, Any] | None = None,
    channel_dtype: str = "float32",
) -> bytes:
    """The bytes of a labbook exchange file (``.lbx``) holding one dataset.

    ``channels`` and ``axes`` map names to arrays (images 2-D ``(y, x)``, spectra 1-D with a
    sweep axis such as ``bias_v``, grids 3-D ``(y, x, sweep)``); ``units`` maps array names to
    units, converted to SI on the way ("pA" → values × 1e-12 in "A"). ``metadata`` uses the
    canonical field names (``bias_v``, ``setpoint_a``, ``scan_size_m`` …) with numbers in the
    name's unit or strings with units ("50 pA"); ``acquired_at`` an aware datetime or ISO
    string. ``header`` is any JSON-able mapping kept as found. Channels are stored as
    little-endian float32 (``channel_dtype="float64"`` for more), axes as float64.

    Raises ``ValueError`` for anything the reader would refuse: an unknown kind or field name,
    a value that does not parse, arrays that do not fit the kind.
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
    if channel_dtype not in ("float32", "float64"):
        raise ValueError("channel_dtype must be 'float32' or 'float64'")
    units = dict(units or {})
    metadata = dict(metadata or {})
    unknown = sorted(set(metadata) - CANONICAL_FIELDS)
    if unknown:
        raise ValueError(
            f"metadata names {unknown} are not labbook fields; put free-form values in header="
        )
    normalised, problems = normalise_metadata(metadata, source="metadata")
    if problems:
        raise ValueError("; ".join(problems))
    normalised.pop("kind", None)

    def prepare(block: Mapping[str, Any], dtype: str, role: str) -> dict[str, np.ndarray]:
        out: dict[str, np.ndarray] = {}
        for name, values in block.items():
            if not isinstance(name, str) or not _ARRAY_NAME.match(name):
                raise ValueError(f"{role} name {name!r} must match {_ARRAY_NAME.pattern}")
            array = np.asarray(values)
            if array.dtype.kind not in "biuf":
                raise ValueError(f"{role} {name!r} is {array.dtype}, not real numbers")
            converted, unit = to_si(array.astype(np.float64), units.get(name))
            units[name] = unit
            out[name] = np.ascontiguousarray(converted, dtype=np.dtype(dtype).newbyteorder("<"))
        return out

    channel_arrays = prepare(channels, channel_dtype, "channel")
    axis_arrays = prepare(axes or {}, "float64", "axis")
    check = ParsedFile(
        kind=kind,
        channels={n: a.astype(a.dtype.newbyteorder("=")) for n, a in channel_arrays.items()},
        axes={n: a.astype(a.dtype.newbyteorder("=")) for n, a in axis_arrays.items()},
        units={n: units.get(n, "") for n in list(channel_arrays) + list(axis_arrays)},
    )
    try:
        check.validate(DEFAULT_LIMITS)
    except ReaderError as exc:
        raise ValueError(str(exc).replace("invalid result: ", "cannot write: ")) from exc

    members: list[tuple[str, bytes]] = []

    def entries(arrays: dict[str, np.ndarray], folder: str) -> list[dict[str, Any]]:
        listed = []
        for name, array in arrays.items():
            buffer = io.BytesIO()
            np.lib.format.write_array(buffer, array, version=(1, 0), allow_pickle=False)
            payload = buffer.getvalue()
            member = f"{folder}/{name}.npy"
            members.append((member, payload))
            listed.append(
                {
                    "name": name,
                    "unit": units.get(name, ""),
                    "file": member,
                    "shape": list(array.shape),
                    "dtype": array.dtype.str,
                    "sha256": hashlib.sha256(payload).hexdigest(),
                }
            )
        return listed

    acquired = normalised.get("acquired_at")
    manifest = {
        "format": FORMAT,
        "version": VERSION,
        "kind": kind,
        "channels": entries(channel_arrays, "channels"),
        "axes": entries(axis_arrays, "axes"),
        "metadata": {
            **{k: jsonable(v) for k, v in normalised.items() if k != "acquired_at"},
            **({"acquired_at": acquired.isoformat()} if isinstance(acquired, datetime) else {}),
        },
        "header": jsonable(dict(header or {}), max_items=4096),
        "writer": f"labbook.datafiles.readers.exchange {VERSION}",
    }
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as archive:
        text = json.dumps(manifest, indent=2, allow_nan=False) + "\n"
        archive.writestr(_info(MANIFEST, zipfile.ZIP_STORED), text.encode("utf-8"))
        for member, payload in members:
            archive.writestr(_info(member, zipfile.ZIP_DEFLATED), payload)
    return out.getvalue()


def _info(name: str, compression: int) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=_EPOCH)
    info.compress_type = compression
    info.external_attr = 0o644 << 16
    info.create_system = 3  # unix: the same bytes on every platform
    return info


# --- reading -----------------------------------------------------------------------------------


def read(source: Source, given: Mapping[str, Any], limits: ReaderLimits) -> ParsedFile:
    """Read a labbook exchange file (module docstring)."""
    archive = open_archive(source, limits, label="exchange archive")
    return read_archive(archive, source, given, limits)


def read_archive(
    archive: SafeArchive, source: Source, given: Mapping[str, Any], limits: ReaderLimits
) -> ParsedFile:
    """Read an already checked archive that holds ``labbook-exchange.json``."""
    by_name = {info.filename: info for info in archive.members}
    if MANIFEST not in by_name:
        raise ReaderError(f"corrupt: the exchange archive has no {MANIFEST}")
    try:
        manifest = loads_json_object(
            archive.read(by_name[MANIFEST], max_bytes=limits.max_header_bytes),
            what=MANIFEST,
            max_bytes=limits.max_header_bytes,
        )
    except ValueError as exc:
        if isinstance(exc, ReaderError):
            raise
        raise ReaderError(f"corrupt: {exc}") from exc
    warnings: list[str] = []
    _check_version(manifest)
    kind = manifest.get("kind")
    if kind not in KINDS:
        raise ReaderError(f"corrupt: {MANIFEST} kind {kind!r} is not one of {KINDS}")

    budget = ElementBudget(limits)
    used = {MANIFEST}
    units: dict[str, str] = {}

    def load(block: str) -> dict[str, np.ndarray]:
        listed = manifest.get(block, [])
        if not isinstance(listed, list):
            raise ReaderError(f"corrupt: {MANIFEST} {block} must be a list")
        out: dict[str, np.ndarray] = {}
        for entry in listed:
            if not isinstance(entry, Mapping):
                raise ReaderError(f"corrupt: {MANIFEST} {block} entries must be objects")
            name, member = entry.get("name"), entry.get("file")
            if not isinstance(name, str) or not _ARRAY_NAME.match(name):
                raise ReaderError(f"corrupt: {MANIFEST} {block} name {name!r} is not a plain name")
            if name in out or name in units:
                raise ReaderError(f"corrupt: {MANIFEST} names {name!r} twice")
            if not isinstance(member, str) or member not in by_name or member in used:
                raise ReaderError(
                    f"corrupt: {block[:-1] if block.endswith('s') else block} {name!r}: member "
                    f"{member!r} is missing from the archive or listed twice"
                )
            used.add(member)
            info = by_name[member]
            what = f"exchange member {member!r}"
            # The member's .npy header is checked against the limits before its data are
            # decompressed; the checksum then covers the bytes as stored.
            array, payload = archive.read_npy_and_bytes(info, what=what, budget=budget)
            expected = entry.get("sha256")
            if not isinstance(expected, str):
                raise ReaderError(f"corrupt: {what} has no sha256 in {MANIFEST}")
            if hashlib.sha256(payload).hexdigest() != expected:
                raise ReaderError(f"corrupt: {what} does not match the SHA-256 in {MANIFEST}")
            if array.dtype.str not in _DTYPES:
                raise ReaderError(f"corrupt: {what} is {array.dtype}; the layout stores <f4 or <f8")
            if entry.get("shape") is not None and list(array.shape) != entry.get("shape"):
                raise ReaderError(
                    f"corrupt: {what} has shape {list(array.shape)}, {MANIFEST} says "
                    f"{entry.get('shape')}"
                )
            unit = entry.get("unit", "")
            if not isinstance(unit, str):
                raise ReaderError(f"corrupt: {MANIFEST} unit of {name!r} must be a string")
            values, si = to_si(array, unit)
            out[name] = values
            units[name] = si
        return out

    channels = load("channels")
    axes = load("axes")
    extra = sorted(set(by_name) - used)
    if extra:
        warnings.append(f"exchange members not described by {MANIFEST} were ignored: {extra}")

    stated = manifest.get("metadata", {})
    if not isinstance(stated, Mapping):
        raise ReaderError(f"corrupt: {MANIFEST} metadata must be an object")
    unknown = sorted(set(stated) - CANONICAL_FIELDS)
    if unknown:
        warnings.append(f"exchange metadata fields unknown to this reader were ignored: {unknown}")
    metadata, problems = normalise_metadata(
        {k: v for k, v in stated.items() if k in CANONICAL_FIELDS}, source=MANIFEST
    )
    metadata.pop("kind", None)
    header = manifest.get("header", {})
    return ParsedFile(
        kind=kind,
        channels=channels,
        axes=axes,
        units=units,
        metadata=metadata,
        raw_header={
            "format": FORMAT,
            "version": manifest.get("version"),
            "writer": manifest.get("writer"),
            "metadata": stated,
            "header": header,
        },
        reader=f"exchange/{VERSION}",
        warnings=warnings + problems,
    )


def _check_version(manifest: Mapping[str, Any]) -> None:
    if manifest.get("format") != FORMAT:
        raise ReaderError(
            f"corrupt: {MANIFEST} says format {manifest.get('format')!r}, expected {FORMAT!r}"
        )
    version = manifest.get("version")
    match = re.fullmatch(r"(\d+)\.(\d+)", version) if isinstance(version, str) else None
    if match is None:
        raise ReaderError(f"corrupt: {MANIFEST} version {version!r} is not 'MAJOR.MINOR'")
    if int(match.group(1)) != _MAJOR:
        raise ReaderError(
            f"unsupported: labbook exchange version {version}; this reader reads {_MAJOR}.x"
        )
