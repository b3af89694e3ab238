"""NumPy ``.npy`` and ``.npz`` files, with their description in a JSON sidecar or the upload's
``metadata`` JSON (a bare array says nothing about its units or its acquisition).

Safety first, since both formats come from anywhere:

* ``.npy`` headers are parsed with numpy's own header parser (a literal, never code) and the
  shape is checked against the limits *before* any data is touched; the data are then viewed
  with ``np.frombuffer``. ``np.load`` is never called, and nothing is ever unpickled: an
  object dtype is refused outright (``allow_pickle`` is never true anywhere).
* ``.npz`` is a ZIP archive: every member is checked in the directory first (names without
  path traversal, no nested archives, no encryption, only stored or deflated members, the
  uncompressed sizes and the compression ratio within the limits, no overlapping members),
  then each member's own ``.npy`` header is checked against the directory before the member
  is decompressed into a buffer of exactly the declared size (``zipfile`` never yields more
  than the declared size, so a lying stream cannot grow past it).

The archive checks here are shared with the labbook exchange reader (``exchange.py``).
"""

from __future__ import annotations

import io
import re
import zipfile
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from labbook.datafiles.readers import (
    EXCHANGE_MANIFEST,
    ElementBudget,
    ParsedFile,
    ReaderError,
    ReaderLimits,
    Source,
    check_dtype,
    infer_kind,
)
from labbook.datafiles.readers.normalise import axis_name, normalise_metadata, snake, to_si

__all__ = ["SafeArchive", "open_archive", "parse_npy", "read_npy", "read_npz"]

# numpy's own bound on a header it will parse (it refuses larger ones as unsafe).
_MAX_NPY_HEADER = 10_000

# Names that make a 1-D array of an .npz an axis of the others, when the description says
# nothing: one sweep axis (bias, else z, else time) — the "x"/"y" of a spectrum are lock-in
# outputs — and x/y only beside images and grids.
_SWEEP_AXES = (
    {"bias", "bias_v", "v", "voltage", "sample_bias", "tip_bias", "v_bias"},
    {"z", "z_m", "distance", "height"},
    {"time", "time_s", "t"},
)
_IMAGE_AXES = {"x", "x_m", "y", "y_m"}
_ARCHIVE_EXTENSIONS = (
    ".zip",
    ".npz",
    ".lbx",
    ".gz",
    ".tgz",
    ".tar",
    ".bz2",
    ".xz",
    ".7z",
    ".rar",
    ".zst",
    ".jar",
)
_DRIVE = re.compile(r"^[A-Za-z]:")


# --- .npy --------------------------------------------------------------------------------------


def _npy_header(stream: io.BytesIO, what: str) -> tuple[tuple[int, ...], bool, np.dtype]:
    try:
        version = np.lib.format.read_magic(stream)
    except ValueError as exc:
        if len(stream.getbuffer()) < 8:
            raise ReaderError(f"truncated: {what} ends inside its .npy magic") from exc
        raise ReaderError(f"corrupt: {what} is not a .npy array ({exc})") from exc
    try:
        if version == (1, 0):
            return np.lib.format.read_array_header_1_0(stream, max_header_size=_MAX_NPY_HEADER)
        if version == (2, 0):
            return np.lib.format.read_array_header_2_0(stream, max_header_size=_MAX_NPY_HEADER)
    except ValueError as exc:
        message = str(exc)
        if "EOF" in message or "truncated" in message.lower():
            raise ReaderError(f"truncated: {what} ends inside its .npy header") from exc
        raise ReaderError(f"corrupt header: {what}: {message}") from exc
    except (SyntaxError, TypeError, MemoryError, RecursionError) as exc:
        raise ReaderError(f"corrupt header: {what}: {exc}") from exc
    raise ReaderError(
        f"unsupported: {what} is .npy format version {version[0]}.{version[1]}; labbook reads "
        "1.0 and 2.0 (3.0 exists only for structured dtypes, which are not measurements)"
    )


def parse_npy(
    data: bytes | bytearray | memoryview, *, what: str, budget: ElementBudget
) -> np.ndarray:
    """The array in a complete ``.npy`` byte string, after every check (module docstring).

    Raises :class:`ReaderError` for an absurd or malformed header, a refused dtype,
    truncated data or trailing bytes.
    """
    stream = io.BytesIO(data)
    shape, fortran_order, dtype = _npy_header(stream, what)
    check_dtype(dtype, what=what)
    if not shape:
        raise ReaderError(f"unsupported: {what} is a 0-d scalar, not a measured array")
    count = budget.claim(shape, what=what)
    offset = stream.tell()
    expected = count * dtype.itemsize
    available = len(data) - offset
    if available < expected:
        raise ReaderError(
            f"truncated: {what} holds {available:,} bytes of data; its header claims shape "
            f"{tuple(shape)} of {dtype} = {expected:,} bytes"
        )
    if available > expected:
        raise ReaderError(
            f"corrupt: {what} has {available - expected:,} bytes after the array its header "
            "describes"
        )
    array = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
    if fortran_order:
        return array.reshape(shape[::-1]).transpose()
    return array.reshape(shape)


def read_npy(source: Source, given: Mapping[str, Any], limits: ReaderLimits) -> ParsedFile:
    """One array; its name, unit, kind and acquisition come from the sidecar or upload."""
    budget = ElementBudget(limits)
    array = parse_npy(source.read_bytes(), what=f"{source.name!r}", budget=budget)
    stem = re.sub(r"\.npy$", "", source.name.rsplit("/", 1)[-1], flags=re.IGNORECASE)
    name = str(given.get("channel_name") or given.get("channel") or snake(stem) or "data")
    units = dict(_units_from(given))
    if "unit" in given and isinstance(given["unit"], str):
        units.setdefault(name, given["unit"])
    header = {"npy": {"shape": list(array.shape), "dtype": str(array.dtype)}}
    return assemble({name: array}, given, units=units, axis_names=(), raw_header=header)


# --- ZIP archives ------------------------------------------------------------------------------


def safe_member_name(name: str) -> str | None:
    """Why an archive member's name is refused, or None when it is a plain relative name."""
    if not name or len(name) > 255:
        return "an empty or over-long name"
    if any(ord(char) < 32 for char in name):
        return "control characters in the name"
    if "\\" in name:
        return "a backslash (a Windows path) in the name"
    if name.startswith("/") or _DRIVE.match(name):
        return "an absolute path"
    if any(part == ".." for part in name.split("/")):
        return "a '..' component (path traversal)"
    if name.lower().endswith(_ARCHIVE_EXTENSIONS):
        return "a nested archive"
    return None


@dataclass
class SafeArchive:
    """A ZIP archive whose directory passed every check; members read with a hard bound."""

    zipfile: zipfile.ZipFile
    members: list[zipfile.ZipInfo]
    label: str

    def names(self) -> list[str]:
        return [info.filename for info in self.members]

    def read(self, info: zipfile.ZipInfo, *, max_bytes: int) -> bytes:
        """The member's bytes: never more than its declared size, CRC checked."""
        if info.file_size > max_bytes:
            raise ReaderError(
                f"too large: {self.label} member {info.filename!r} is {info.file_size:,} bytes, "
                f"more than {max_bytes:,}"
            )
        buffer = self._read_into(info, bytearray(info.file_size))
        return bytes(buffer)

    def read_npy(self, info: zipfile.ZipInfo, *, what: str, budget: ElementBudget) -> np.ndarray:
        """A ``.npy`` member: its header is checked against the directory before the data
        are decompressed into one buffer of exactly the declared size."""
        return self.read_npy_and_bytes(info, what=what, budget=budget)[0]

    def read_npy_and_bytes(
        self, info: zipfile.ZipInfo, *, what: str, budget: ElementBudget
    ) -> tuple[np.ndarray, memoryview]:
        """:meth:`read_npy`, and the member's bytes (to check a checksum) without a copy."""
        with self._open(info) as handle:
            head = handle.read(min(info.file_size, _MAX_NPY_HEADER + 64))
        if head[:4] in (b"PK\x03\x04", b"PK\x05\x06"):
            raise ReaderError(f"refused: {what} is itself a ZIP archive (nested archive)")
        stream = io.BytesIO(head)
        shape, _, dtype = _npy_header(stream, what)
        check_dtype(dtype, what=what)
        if not shape:
            raise ReaderError(f"unsupported: {what} is a 0-d scalar, not a measured array")
        count = budget.claim(shape, what=what)
        declared = stream.tell() + count * dtype.itemsize
        if declared != info.file_size:
            problem = "truncated" if info.file_size < declared else "corrupt"
            raise ReaderError(
                f"{problem}: {what} is {info.file_size:,} bytes in the archive directory; its "
                f".npy header (shape {tuple(shape)}, {dtype}) needs {declared:,}"
            )
        view = memoryview(self._read_into(info, bytearray(info.file_size)))
        return parse_npy(view, what=what, budget=ElementBudget(budget.limits)), view

    def _open(self, info: zipfile.ZipInfo):
        try:
            return self.zipfile.open(info)
        except (zipfile.BadZipFile, NotImplementedError, RuntimeError, ValueError) as exc:
            raise ReaderError(f"corrupt: {self.label} member {info.filename!r}: {exc}") from exc

    def _read_into(self, info: zipfile.ZipInfo, buffer: bytearray) -> bytearray:
        view = memoryview(buffer)
        position = 0
        try:
            with self._open(info) as handle:
                while position < len(buffer):
                    got = handle.readinto(view[position:])
                    if not got:
                        break
                    position += got
                # One more read reaches the end of the member, where zipfile checks the CRC.
                if handle.read(1):
                    raise ReaderError(
                        f"corrupt: {self.label} member {info.filename!r} is longer "
                        "than its directory entry"
                    )
        except (zipfile.BadZipFile, EOFError, OSError, ValueError) as exc:
            if isinstance(exc, ReaderError):
                raise
            raise ReaderError(
                f"corrupt or truncated: {self.label} member {info.filename!r}: {exc}"
            ) from exc
        if position < len(buffer):
            raise ReaderError(
                f"truncated: {self.label} member {info.filename!r} ends after {position:,} of "
                f"{len(buffer):,} bytes"
            )
        return buffer


def open_archive(source: Source, limits: ReaderLimits, *, label: str) -> SafeArchive:
    """Open a ZIP and check its whole directory before anything is decompressed."""
    try:
        # From memory: zipfile leaves a file object it was given open, and the members are
        # read whole anyway.
        archive = zipfile.ZipFile(io.BytesIO(source.read_bytes()))
    except zipfile.BadZipFile as exc:
        # The magic bytes said ZIP, so a missing end-of-directory record means the end is gone.
        raise ReaderError(
            f"truncated: {source.name!r} starts as a ZIP archive ({label}) but its central "
            f"directory is missing or damaged ({exc})"
        ) from exc
    except (OSError, ValueError, EOFError) as exc:
        raise ReaderError(f"corrupt: {source.name!r} ({label}): {exc}") from exc
    infos = archive.infolist()
    if len(infos) > limits.max_archive_members:
        raise ReaderError(
            f"refused: {label} has {len(infos):,} members, more than {limits.max_archive_members}"
        )
    seen: set[str] = set()
    members: list[zipfile.ZipInfo] = []
    total = 0
    member_cap = limits.max_elements * 8 + 2 * _MAX_NPY_HEADER
    for info in infos:
        problem = safe_member_name(info.filename)
        if problem:
            raise ReaderError(f"refused: {label} member {info.filename!r} has {problem}")
        if info.filename in seen:
            raise ReaderError(f"refused: {label} has two members named {info.filename!r}")
        seen.add(info.filename)
        if info.flag_bits & 0x1:
            raise ReaderError(f"refused: {label} member {info.filename!r} is encrypted")
        if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
            raise ReaderError(
                f"unsupported: {label} member {info.filename!r} uses compression method "
                f"{info.compress_type}; only stored and deflated members are read"
            )
        if info.is_dir():
            continue
        if info.file_size > member_cap:
            raise ReaderError(
                f"too large: {label} member {info.filename!r} claims {info.file_size:,} bytes "
                f"uncompressed, more than the {member_cap:,} the element limit allows; "
                "refused before decompressing"
            )
        total += info.file_size
        if total > limits.max_uncompressed_bytes:
            raise ReaderError(
                f"too large: {label} members claim {total:,} bytes uncompressed together, more "
                f"than the limit of {limits.max_uncompressed_bytes:,}; refused before "
                "decompressing"
            )
        ratio = info.file_size / max(info.compress_size, 1)
        if info.file_size > limits.ratio_floor_bytes and ratio > limits.max_compression_ratio:
            raise ReaderError(
                f"refused: {label} member {info.filename!r} expands {ratio:,.0f}× "
                f"({info.compress_size:,} → {info.file_size:,} bytes), beyond the "
                f"{limits.max_compression_ratio:g}× a measurement compresses to (a zip bomb); "
                "refused before decompressing"
            )
        members.append(info)
    _refuse_overlaps(members, archive, label)
    return SafeArchive(archive, members, label)


def _refuse_overlaps(members: list[zipfile.ZipInfo], archive: zipfile.ZipFile, label: str) -> None:
    # Entries that share compressed data multiply one stream's output (a "non-recursive"
    # zip bomb); honest archives store members one after the other.
    ordered = sorted(members, key=lambda info: info.header_offset)
    end_of_data = getattr(archive, "start_dir", None)
    for current, following in zip(ordered, ordered[1:] + [None], strict=True):
        minimum_end = (
            current.header_offset + 30 + len(current.orig_filename) + current.compress_size
        )
        limit = following.header_offset if following is not None else end_of_data
        if limit is not None and minimum_end > limit:
            raise ReaderError(
                f"refused: {label} members {current.filename!r} and the next one overlap "
                "in the archive (a zip-bomb construction)"
            )


def read_npz(source: Source, given: Mapping[str, Any], limits: ReaderLimits) -> ParsedFile:
    """Named arrays; which are axes, their units and the kind come from the sidecar or upload,
    else from the names (``bias``, ``z``, ``x`` … are axes of the other arrays)."""
    archive = open_archive(source, limits, label=".npz")
    if EXCHANGE_MANIFEST in archive.names():
        # An exchange archive rewritten by a tool that moved the manifest from first place.
        from labbook.datafiles.readers import exchange

        return exchange.read_archive(archive, source, given, limits)
    budget = ElementBudget(limits)
    arrays: dict[str, np.ndarray] = {}
    listing: list[dict[str, Any]] = []
    for info in archive.members:
        if info.is_dir():
            continue
        if not info.filename.endswith(".npy"):
            raise ReaderError(
                f"refused: .npz member {info.filename!r} is not a .npy array (an .npz holds "
                "only arrays)"
            )
        name = info.filename[: -len(".npy")].replace("/", ".")
        arrays[name] = archive.read_npy(info, what=f".npz member {info.filename!r}", budget=budget)
        listing.append(
            {
                "name": name,
                "shape": list(arrays[name].shape),
                "dtype": str(arrays[name].dtype),
                "compressed_bytes": info.compress_size,
                "bytes": info.file_size,
            }
        )
    if not arrays:
        raise ReaderError("empty: the .npz holds no arrays")
    axes = given.get("axes")
    axis_names = list(axes) if isinstance(axes, list | dict) else _axes_by_name(arrays)
    return assemble(
        arrays,
        given,
        units=_units_from(given),
        axis_names=axis_names,
        raw_header={"npz": {"members": listing}},
    )


def _axes_by_name(arrays: Mapping[str, np.ndarray]) -> list[str]:
    lines = [name for name, array in arrays.items() if array.ndim == 1]
    chosen: list[str] = []
    for names in _SWEEP_AXES:
        found = [name for name in lines if snake(name) in names]
        if found:
            chosen = found[:1]
            break
    if any(array.ndim >= 2 for array in arrays.values()):
        chosen += [name for name in lines if snake(name) in _IMAGE_AXES]
    # All arrays axis-like would leave no data: then none is an axis.
    return chosen if len(chosen) < len(arrays) else []


# --- arrays + a description → ParsedFile -------------------------------------------------------


def _units_from(given: Mapping[str, Any]) -> dict[str, str]:
    """Units the sidecar or upload states: ``units: {name: unit}``, or ``channels``/``axes``
    given as ``{name: unit}`` or ``{name: {"unit": unit}}``."""
    units: dict[str, str] = {}
    for key in ("channels", "axes", "units"):
        block = given.get(key)
        if not isinstance(block, Mapping):
            continue
        for name, value in block.items():
            if isinstance(value, str):
                units[str(name)] = value
            elif isinstance(value, Mapping) and isinstance(value.get("unit"), str):
                units[str(name)] = value["unit"]
    return units


def assemble(
    arrays: Mapping[str, np.ndarray],
    given: Mapping[str, Any],
    *,
    units: Mapping[str, str],
    axis_names: Any,
    raw_header: dict[str, Any],
) -> ParsedFile:
    """Split arrays into channels and axes, convert to SI, and infer the kind.

    A 1-D or 3-D array without an axis of its sweep length gets a bias axis from the
    description's ``sweep_start_v``/``sweep_end_v`` (evenly spaced, as a sweep is), if given.
    """
    warnings: list[str] = []
    missing = [name for name in axis_names if name not in arrays]
    if missing:
        warnings.append(f"axes {missing} named in the description are not in the file")
    channels: dict[str, np.ndarray] = {}
    axes: dict[str, np.ndarray] = {}
    out_units: dict[str, str] = {}
    for name, array in arrays.items():
        values, unit = to_si(array, units.get(name))
        if name in axis_names:
            if values.ndim != 1:
                raise ReaderError(f"unsupported: axis {name!r} is {values.ndim}-D, not 1-D")
            canonical = axis_name(name, unit)
            if canonical in axes or canonical in arrays and canonical != name:
                canonical = name  # two axes of one unit, or a channel of that name: keep names
            axes[canonical] = values
            out_units[canonical] = unit
        else:
            channels[name] = values
            out_units[name] = unit
    if not channels:
        raise ReaderError("empty: every array is an axis; there is no data channel")
    first = next(iter(channels.values()))
    if first.ndim in (1, 3) and not any(a.shape[0] == first.shape[-1] for a in axes.values()):
        described, _ = normalise_metadata(given, source="description")
        start, end = described.get("sweep_start_v"), described.get("sweep_end_v")
        if start is not None and end is not None:
            axes["bias_v"] = np.linspace(start, end, first.shape[-1])
            out_units["bias_v"] = "V"
            raw_header["bias_v_from"] = "sweep_start_v, sweep_end_v (evenly spaced)"
    kind = infer_kind(channels, out_units, axes)
    return ParsedFile(
        kind=kind,
        channels=channels,
        axes=axes,
        units=out_units,
        raw_header=raw_header,
        warnings=warnings,
    )
