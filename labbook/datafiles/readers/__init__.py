"""Readers of acquired files in open formats, and the registry that picks one for a file.

``read_file(name, data, metadata=…)`` returns a :class:`ParsedFile` (arrays, axes, units,
normalised metadata, raw header) or raises :class:`ReaderError` with a message that names the
problem, so ingestion keeps the bytes with status ``unreadable`` and that message. A reader
never returns partial data: a truncated file, an unknown format, an absurd header or a
hostile archive is an error, found before anything large is allocated (:class:`ReaderLimits`).

Which reader reads a file:

1. **Plugins first**, from the entry-point group ``labbook.readers`` (sorted by entry-point
   name). A plugin is a callable ``read(name, data, metadata) -> ParsedFile | None`` that
   returns None for a file that is not its format. Plugins go first so that a lab's own layout
   inside a generic container (a controller writing HDF5 its own way) wins over the generic
   reader. A plugin that fails to import, or raises anything but :class:`ReaderError`, is
   logged and skipped: it never stops ingestion.
2. **Built-ins by magic bytes** (HDF5, TIFF, NumPy ``.npy``, ZIP → labbook exchange or
   ``.npz``), then **by extension** (text/CSV spectra have no magic bytes).

Pure Python: no Django import (DESIGN §2). See ``docs/readers.md`` for writing a plugin.
"""

from __future__ import annotations

import functools
import importlib
import importlib.metadata
import inspect
import json
import logging
import math
import os
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import IO, Any

import numpy as np

from labbook.datafiles.readers.normalise import (
    CANONICAL_FIELDS,
    jsonable,
    loads_json_object,
    normalise_metadata,
)

__all__ = [
    "DEFAULT_LIMITS",
    "KINDS",
    "PLUGIN_GROUP",
    "ElementBudget",
    "ParsedFile",
    "ReaderError",
    "ReaderLimits",
    "Source",
    "available_readers",
    "detect_format",
    "infer_kind",
    "plugin_status",
    "read_file",
    "reload_plugins",
    "run_isolated",
    "sidecar_paths",
]

logger = logging.getLogger("labbook.datafiles.readers")

#: The entry-point group a lab's own reader package declares (DEVELOPERS.md).
PLUGIN_GROUP = "labbook.readers"

#: File kinds (DESIGN §4 "file metadata" ``kind``).
KINDS: tuple[str, ...] = ("topograph", "current", "spectrum", "grid", "other")

# Dimensions each kind's channels have: images 2-D, spectra 1-D, grids 3-D (…, sweep last).
_KIND_NDIM: dict[str, tuple[int, ...]] = {
    "topograph": (2,),
    "current": (2,),
    "spectrum": (1,),
    "grid": (3,),
    "other": (1, 2, 3),
}

_NAME = re.compile(r"^[^\x00-\x1f/\\]{1,128}$")


class ReaderError(ValueError):
    """A file cannot be read. The message names the problem ("truncated: …", "unknown
    format …", "too large: …"); ``reader`` names the reader that refused it, if one did."""

    def __init__(self, message: str, *, reader: str | None = None) -> None:
        super().__init__(message)
        self.reader = reader


@dataclass(frozen=True)
class ReaderLimits:
    """Bounds every reader checks before it allocates: hostile files are real.

    The defaults hold any real acquisition (a 1024×1024×2048 float32 dI/dV grid is 2^31
    elements too many; 512×512×1024 fits) and refuse headers that claim the impossible.
    """

    #: Largest file read at all.
    max_file_bytes: int = 2 * 1024**3
    #: Elements of one array (2^28 float32 = 1 GiB).
    max_elements: int = 2**28
    #: Elements of all arrays of one file together.
    max_total_elements: int = 2**29
    #: Dimensions of one array (a grid is 3-D).
    max_ndim: int = 3
    #: Channels plus axes of one file.
    max_arrays: int = 256
    #: Members of an archive (``.npz``, exchange).
    max_archive_members: int = 1024
    #: Uncompressed bytes of all members of an archive together, as its directory claims.
    max_uncompressed_bytes: int = 4 * 1024**3
    #: Uncompressed/compressed ratio of one archive member above ``ratio_floor_bytes``.
    #: Measured data deflates 1–5×; a zip bomb is ~1000×.
    max_compression_ratio: float = 100.0
    ratio_floor_bytes: int = 16 * 1024**2
    #: JSON headers, sidecars, a TIFF description, a text header block.
    max_header_bytes: int = 4 * 1024**2
    #: Text spectra (parsed in Python: larger text belongs in a binary format).
    max_text_bytes: int = 256 * 1024**2
    #: HDF5 objects visited, TIFF pages.
    max_objects: int = 100_000
    max_pages: int = 1024


DEFAULT_LIMITS = ReaderLimits()


class ElementBudget:
    """Claims array shapes against the limits before any array is allocated.

    ``budget.claim(shape, what="channel z")`` raises :class:`ReaderError` when one array or
    all of them together would be too large. Shapes are multiplied as Python ints: numpy's
    int64 product of a header claiming (2^32, 2^32) would wrap to 0.
    """

    def __init__(self, limits: ReaderLimits = DEFAULT_LIMITS) -> None:
        self.limits = limits
        self.total = 0
        self.arrays = 0

    def claim(self, shape: tuple[int, ...] | list[int], *, what: str) -> int:
        dims = [int(dim) for dim in shape]
        if any(dim < 0 for dim in dims):
            raise ReaderError(f"corrupt header: {what} has a negative dimension {tuple(dims)}")
        if len(dims) > self.limits.max_ndim:
            raise ReaderError(
                f"too many dimensions: {what} has {len(dims)} (shape {tuple(dims)}); "
                f"at most {self.limits.max_ndim} are read"
            )
        count = math.prod(dims)
        if count > self.limits.max_elements:
            raise ReaderError(
                f"too large: {what} claims shape {tuple(dims)} = {count:,} elements, more than "
                f"the limit of {self.limits.max_elements:,}; refused before reading"
            )
        self.total += count
        self.arrays += 1
        if self.total > self.limits.max_total_elements:
            raise ReaderError(
                f"too large: the arrays of this file claim {self.total:,} elements together, "
                f"more than the limit of {self.limits.max_total_elements:,}"
            )
        if self.arrays > self.limits.max_arrays:
            raise ReaderError(f"too many arrays: more than {self.limits.max_arrays} in one file")
        return count


def infer_kind(
    channels: Mapping[str, np.ndarray], units: Mapping[str, str], axes: Mapping[str, np.ndarray]
) -> str:
    """The kind the arrays themselves show: a 2-D channel in metres is a topograph, in amperes
    a current image, otherwise "other"; 1-D channels with a sweep axis a spectrum; 3-D
    channels with an axis along their last dimension a grid. Channels of several shapes are
    "other"."""
    shapes = {array.shape for array in channels.values()}
    if len(shapes) != 1:
        return "other"
    name, first = next(iter(channels.items()))
    swept = any(axis.ndim == 1 and axis.shape[0] == first.shape[-1] for axis in axes.values())
    if first.ndim == 2:
        return {"m": "topograph", "A": "current"}.get(units.get(name, ""), "other")
    if first.ndim == 1:
        return "spectrum" if swept else "other"
    if first.ndim == 3:
        return "grid" if swept else "other"
    return "other"


def check_dtype(dtype: np.dtype, *, what: str) -> None:
    """Refuse what labbook cannot store as measured numbers: complex, objects (pickles),
    strings, records, dates. Real integers, floats and booleans pass."""
    if dtype.hasobject:
        raise ReaderError(
            f"unsupported dtype: {what} holds Python objects ({dtype}); they would need "
            "unpickling, which labbook never does"
        )
    if dtype.kind == "c":
        raise ReaderError(
            f"unsupported dtype: {what} is complex ({dtype}); store real and imaginary parts "
            "(or X and Y) as two channels"
        )
    if dtype.kind not in "biuf" or dtype.fields is not None or dtype.subdtype is not None:
        raise ReaderError(f"unsupported dtype: {what} is {dtype}, not a real number type")


def as_measurement(array: np.ndarray, *, what: str) -> np.ndarray:
    """A channel or axis as labbook keeps it: float32 or float64, native byte order.

    Integers (raw counts) and booleans (masks) become float64, float16 becomes float32; any
    other dtype is refused (:func:`check_dtype`).
    """
    array = np.asarray(array)
    check_dtype(array.dtype, what=what)
    if array.dtype.kind in "biu":
        return array.astype(np.float64)
    if array.dtype.itemsize < 4:
        return array.astype(np.float32)
    if not array.dtype.isnative:
        return array.astype(array.dtype.newbyteorder("="))
    return array


@dataclass
class ParsedFile:
    """What a reader found in a file, in labbook's terms.

    ``channels``: name → array (images 2-D ``(y, x)``; spectra 1-D sharing an axis; grids 3-D
    ``(y, x, sweep)``), float32 or float64, in SI when the unit was known. ``axes``: name →
    1-D array (``bias_v``, ``x_m``, ``z_m`` …). ``units``: channel or axis name → unit symbol
    ("m", "A", "V", "Hz", "" when unknown or dimensionless). ``metadata``: the normalised
    fields of DESIGN §4 (``acquired_at`` an aware UTC datetime, the rest JSON values).
    ``raw_header``: everything as found, JSON-serialisable. ``reader``: ``"name/version"``.
    ``warnings``: what was found but could not be used (never silently dropped).
    """

    kind: str
    channels: dict[str, np.ndarray]
    axes: dict[str, np.ndarray] = field(default_factory=dict)
    units: dict[str, str] = field(default_factory=dict)
    metadata: dict[str, Any] = field(default_factory=dict)
    raw_header: dict[str, Any] = field(default_factory=dict)
    reader: str = ""
    warnings: list[str] = field(default_factory=list)

    def validate(self, limits: ReaderLimits = DEFAULT_LIMITS) -> None:
        """Raise :class:`ReaderError` unless this is a complete, consistent result."""
        if self.kind not in KINDS:
            raise ReaderError(f"invalid result: kind {self.kind!r} is not one of {KINDS}")
        if not isinstance(self.channels, dict) or not self.channels:
            raise ReaderError("invalid result: no channels")
        if not isinstance(self.axes, dict):
            raise ReaderError("invalid result: axes must be a dict")
        budget = ElementBudget(limits)
        shapes: set[tuple[int, ...]] = set()
        for name, array in self.channels.items():
            self._check_array(name, array, budget, "channel")
            if array.ndim not in _KIND_NDIM[self.kind]:
                raise ReaderError(
                    f"invalid result: channel {name!r} is {array.ndim}-D, a {self.kind} has "
                    f"{' or '.join(str(n) for n in _KIND_NDIM[self.kind])}-D channels"
                )
            shapes.add(array.shape)
        if len(shapes) != 1 and self.kind != "other":
            raise ReaderError(
                f"invalid result: the channels of a {self.kind} differ in shape {sorted(shapes)}"
            )
        dims = {dim for shape in shapes for dim in shape}
        for name, array in self.axes.items():
            self._check_array(name, array, budget, "axis")
            if name in self.channels:
                raise ReaderError(f"invalid result: {name!r} is both a channel and an axis")
            if array.ndim != 1 or array.shape[0] not in dims:
                raise ReaderError(
                    f"invalid result: axis {name!r} (shape {array.shape}) matches no dimension "
                    f"of the channels {sorted(shapes)}"
                )
        if self.kind in ("spectrum", "grid"):
            (shape,) = shapes
            if not any(axis.shape[0] == shape[-1] for axis in self.axes.values()):
                raise ReaderError(
                    f"invalid result: a {self.kind} needs an axis of length {shape[-1]} (the sweep)"
                )
        for name, unit in self.units.items():
            if name not in self.channels and name not in self.axes:
                raise ReaderError(f"invalid result: a unit is given for unknown array {name!r}")
            if not isinstance(unit, str) or len(unit) > 64:
                raise ReaderError(f"invalid result: unit of {name!r} must be a short string")
        acquired = self.metadata.get("acquired_at")
        if acquired is not None and (
            not isinstance(acquired, datetime) or acquired.utcoffset() is None
        ):
            raise ReaderError("invalid result: metadata acquired_at must be an aware datetime")
        try:
            json.dumps(
                {k: v for k, v in self.metadata.items() if k != "acquired_at"}, allow_nan=False
            )
            json.dumps(self.raw_header, allow_nan=False)
        except (TypeError, ValueError) as exc:
            raise ReaderError(
                f"invalid result: metadata or header is not plain JSON: {exc}"
            ) from exc

    @staticmethod
    def _check_array(name: Any, array: Any, budget: ElementBudget, what: str) -> None:
        if not isinstance(name, str) or not _NAME.match(name):
            raise ReaderError(f"invalid result: {what} name {name!r} is not a plain name")
        if not isinstance(array, np.ndarray):
            raise ReaderError(f"invalid result: {what} {name!r} is not a numpy array")
        budget.claim(array.shape, what=f"{what} {name!r}")
        if array.size == 0:
            raise ReaderError(f"invalid result: {what} {name!r} is empty")
        if array.dtype not in (np.float32, np.float64) or not array.dtype.isnative:
            raise ReaderError(
                f"invalid result: {what} {name!r} is {array.dtype}, expected native float32/64"
            )


# --- the bytes of a file -----------------------------------------------------------------------


class Source:
    """The file being read: bytes in memory, or a path read on demand (never more than the
    size limit). Readers that can stream (HDF5, TIFF, ZIP) use :meth:`open`."""

    def __init__(
        self,
        name: str,
        data: bytes | bytearray | memoryview | os.PathLike[str],
        limits: ReaderLimits,
    ) -> None:
        self.name = name
        self.limits: ReaderLimits = limits
        self.path: Path | None = None
        self._data: bytes | None = None
        if isinstance(data, bytes | bytearray | memoryview):
            self._data = bytes(data)
            self.size = len(self._data)
        elif isinstance(data, os.PathLike):
            self.path = Path(data)
            try:
                self.size = self.path.stat().st_size
            except OSError as exc:
                raise ReaderError(f"cannot open {name!r}: {exc.strerror or exc}") from exc
        else:
            raise TypeError(f"data must be bytes or a path, not {type(data).__name__}")
        if self.size > limits.max_file_bytes:
            raise ReaderError(
                f"too large: {name!r} is {self.size:,} bytes, more than the limit of "
                f"{limits.max_file_bytes:,}"
            )

    @property
    def extension(self) -> str:
        return _extension(self.name)

    def head(self, count: int = 4096) -> bytes:
        if self._data is not None:
            return self._data[:count]
        with self.open() as handle:
            return handle.read(count)

    def read_bytes(self) -> bytes:
        if self._data is None:
            assert self.path is not None
            with self.path.open("rb") as handle:
                data = handle.read(self.limits.max_file_bytes + 1)
            if len(data) > self.limits.max_file_bytes:
                raise ReaderError(f"too large: {self.name!r} grew past the size limit")
            self._data = data
            self.size = len(data)
        return self._data

    def open(self) -> IO[bytes]:
        if self._data is not None:
            import io

            return io.BytesIO(self._data)
        assert self.path is not None
        return self.path.open("rb")


def _extension(name: str) -> str:
    lowered = name.lower()
    for double in (".npy.json", ".tar.gz"):
        if lowered.endswith(double):
            return double
    return Path(lowered).suffix


# --- built-in readers --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Builtin:
    name: str
    version: str
    module: str
    function: str
    extensions: tuple[str, ...]

    def load(self) -> Callable[[Source, Mapping[str, Any], ReaderLimits], ParsedFile]:
        module = importlib.import_module(f"labbook.datafiles.readers.{self.module}")
        return getattr(module, self.function)

    @property
    def label(self) -> str:
        return f"{self.name}/{self.version}"

    @property
    def title(self) -> str:
        return _TITLES.get(self.name, self.name)


_TITLES = {"hdf5": "HDF5", "tiff": "TIFF", "npy": ".npy", "npz": ".npz", "text": "text"}

# Registered by name; modules are imported on first use so that importing the registry
# (ingestion, the API) does not import h5py and tifffile.
_BUILTINS: dict[str, _Builtin] = {
    b.name: b
    for b in (
        _Builtin("hdf5", "1.0", "hdf5", "read", (".h5", ".hdf5", ".hdf", ".he5", ".nxs")),
        _Builtin("tiff", "1.0", "tiff", "read", (".tif", ".tiff")),
        _Builtin("exchange", "1.0", "exchange", "read", (".lbx",)),
        _Builtin("npy", "1.0", "numpy_arrays", "read_npy", (".npy",)),
        _Builtin("npz", "1.0", "numpy_arrays", "read_npz", (".npz",)),
        _Builtin("text", "1.0", "text_spectra", "read", (".csv", ".tsv", ".txt", ".dat")),
    )
}

#: The first member of a labbook exchange archive (docs/exchange-format.md).
EXCHANGE_MANIFEST = "labbook-exchange.json"

_HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
_TIFF_MAGICS = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_ZIP_MAGICS = (b"PK\x03\x04", b"PK\x05\x06")


def detect_format(name: str, head: bytes) -> str | None:
    """The built-in reader for a file: by its first bytes, else by its extension, else None.

    ``head`` is the file's first bytes (2 KiB or more, so an HDF5 user block of 512/1024
    bytes is seen). A ZIP is the labbook exchange layout when its first member is
    ``labbook-exchange.json`` (the manifest is written first, stored, for exactly this), else
    ``.npz``.
    """
    by_magic = _detect_by_magic(head)
    if by_magic is not None:
        return by_magic
    extension = _extension(name)
    for builtin in _BUILTINS.values():
        if extension in builtin.extensions:
            return builtin.name
    return None


def _detect_by_magic(head: bytes) -> str | None:
    # HDF5 allows a user block of 512·2^n bytes before the superblock.
    if any(head[offset : offset + 8] == _HDF5_MAGIC for offset in (0, 512, 1024, 2048)):
        return "hdf5"
    if head[:4] in _TIFF_MAGICS:
        return "tiff"
    if head[:6] == b"\x93NUMPY":
        return "npy"
    if head[:4] in _ZIP_MAGICS:
        # Local file header: the name starts at byte 30, its length is at byte 26.
        name_length = int.from_bytes(head[26:28], "little") if len(head) >= 30 else 0
        if head[30 : 30 + name_length] == EXCHANGE_MANIFEST.encode():
            return "exchange"
        return "npz"
    return None


def available_readers() -> list[str]:
    """Names of the built-in readers, then ``plugin:<name>`` of every plugin that loaded."""
    return list(_BUILTINS) + [f"plugin:{plugin.name}" for plugin in _plugins()]


# --- plugins -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Plugin:
    name: str
    value: str
    distribution: str
    version: str
    function: Callable[..., ParsedFile | None]
    takes_limits: bool

    @property
    def label(self) -> str:
        return f"plugin:{self.name}/{self.distribution} {self.version}"


_plugin_failures: dict[str, str] = {}


@functools.cache
def _plugins() -> tuple[_Plugin, ...]:
    _plugin_failures.clear()
    loaded: list[_Plugin] = []
    try:
        entry_points = importlib.metadata.entry_points(group=PLUGIN_GROUP)
    except Exception:  # noqa: BLE001 - a broken installed distribution must not stop reads
        logger.exception("cannot list the %s entry points", PLUGIN_GROUP)
        return ()
    for entry_point in sorted(entry_points, key=lambda ep: (ep.name, ep.value)):
        try:
            function = entry_point.load()
        except Exception as exc:  # noqa: BLE001 - a plugin that fails to import is skipped
            message = f"{type(exc).__name__}: {exc}"
            _plugin_failures[entry_point.name] = message
            logger.error(
                "labbook reader plugin %r (%s) failed to load and is skipped: %s",
                entry_point.name,
                entry_point.value,
                message,
            )
            continue
        if not callable(function):
            _plugin_failures[entry_point.name] = f"{entry_point.value} is not callable"
            logger.error("labbook reader plugin %r is not callable; skipped", entry_point.name)
            continue
        try:
            parameters = inspect.signature(function).parameters
            takes_limits = "limits" in parameters or any(
                p.kind is inspect.Parameter.VAR_KEYWORD for p in parameters.values()
            )
        except (TypeError, ValueError):
            takes_limits = False
        distribution = getattr(entry_point, "dist", None)
        loaded.append(
            _Plugin(
                name=entry_point.name,
                value=entry_point.value,
                distribution=distribution.name if distribution else "?",
                version=distribution.version if distribution else "?",
                function=function,
                takes_limits=takes_limits,
            )
        )
    return tuple(loaded)


def reload_plugins() -> list[str]:
    """Forget the loaded plugins and find them again (after installing one in a running
    process, and in tests). Returns the names of the plugins that loaded."""
    _plugins.cache_clear()
    importlib.invalidate_caches()
    return [plugin.name for plugin in _plugins()]


def plugin_status() -> list[dict[str, str]]:
    """Every plugin entry point with ``loaded`` or its load error, for a health page."""
    status = [
        {
            "name": p.name,
            "value": p.value,
            "distribution": f"{p.distribution} {p.version}",
            "status": "loaded",
        }
        for p in _plugins()
    ]
    status += [
        {"name": name, "value": "", "distribution": "", "status": f"failed: {error}"}
        for name, error in sorted(_plugin_failures.items())
    ]
    return status


# --- sidecars ----------------------------------------------------------------------------------


def sidecar_paths(path: str | os.PathLike[str]) -> list[Path]:
    """Where the JSON sidecar of a data file may sit: ``scan.npy.json``, then ``scan.json``.

    A folder watcher should skip files that are some data file's sidecar.
    """
    path = Path(path)
    return [path.with_name(path.name + ".json"), path.with_suffix(".json")]


def _load_sidecar(path: Path, limits: ReaderLimits, warnings: list[str]) -> dict[str, Any] | None:
    for candidate in sidecar_paths(path):
        if candidate == path or not candidate.is_file():
            continue
        try:
            size = candidate.stat().st_size
            if size > limits.max_header_bytes:
                raise ValueError(f"{size} bytes, more than {limits.max_header_bytes}")
            return loads_json_object(
                candidate.read_bytes(),
                what=f"sidecar {candidate.name}",
                max_bytes=limits.max_header_bytes,
            )
        except (OSError, ValueError) as exc:
            # The data may still be readable; the broken sidecar is reported, not fatal.
            warnings.append(f"sidecar {candidate.name} not used: {exc}")
            return None
    return None


# --- read_file ---------------------------------------------------------------------------------


def read_file(
    name: str,
    data: bytes | bytearray | memoryview | os.PathLike[str],
    *,
    metadata: Mapping[str, Any] | None = None,
    limits: ReaderLimits = DEFAULT_LIMITS,
    reader: str | None = None,
    plugins: bool = True,
    timeout_s: float | None = None,
) -> ParsedFile:
    """Read one acquired file and return its :class:`ParsedFile`.

    ``name`` is the file's name as uploaded (its extension is the second clue after the
    magic bytes); ``data`` its bytes, or a path (then a JSON sidecar beside it,
    ``<name>.json`` or ``<stem>.json``, is read too). ``metadata`` is the upload's metadata
    JSON object: its values are normalised like a header and override the file's (with a
    warning where they disagree). ``reader`` forces a built-in reader by name;
    ``plugins=False`` skips the plugins.

    ``timeout_s`` reads in a separate process that is killed after that many seconds: a
    corrupt file can make a C library (libhdf5) loop forever or crash, which in-process would
    take the worker with it. Ingestion of untrusted uploads should pass it; the cost is a fork
    and copying the bytes in and the arrays back (~40 ms for a 512² image, measured).

    Raises :class:`ReaderError` (a ``ValueError``) for every file that cannot be read, with
    a message naming the problem; never returns partial data.
    """
    if metadata is not None and not isinstance(metadata, Mapping):
        raise TypeError(f"metadata must be a mapping, not {type(metadata).__name__}")
    source = Source(name, data, limits)  # the size limit is checked before anything else
    if source.size == 0:
        raise ReaderError(f"empty file: {name!r} has 0 bytes")
    if timeout_s is not None:
        return run_isolated(
            _read_in_child,
            (name, data, dict(metadata) if metadata is not None else None, limits, reader, plugins),
            timeout_s=timeout_s,
            what=f"reading {name!r}",
        )
    warnings: list[str] = []
    sidecar = _load_sidecar(source.path, limits, warnings) if source.path is not None else None
    given: dict[str, Any] = {**(sidecar or {}), **(metadata or {})}

    parsed: ParsedFile | None = None
    label = ""
    if plugins and reader is None:
        parsed, label = _try_plugins(source, given, limits, warnings)
    if parsed is None:
        builtin = _choose_builtin(source, reader, warnings)
        label = builtin.label
        try:
            parsed = builtin.load()(source, given, limits)
        except ReaderError as exc:
            exc.reader = exc.reader or label
            raise
        except MemoryError as exc:
            raise ReaderError(f"too large: out of memory reading {name!r}", reader=label) from exc
        except Exception as exc:  # noqa: BLE001
            # A reader bug or a library error on a corrupt file: still an unreadable file
            # with a message, never an unexplained crash of ingestion.
            logger.warning("reader %s failed on %r", label, name, exc_info=True)
            raise ReaderError(
                f"corrupt {builtin.title} file: {type(exc).__name__}: {exc}", reader=label
            ) from exc
    return _finish(parsed, label, source, sidecar, metadata, warnings, limits)


def _read_in_child(name, data, metadata, limits, reader, plugins) -> ParsedFile:
    return read_file(name, data, metadata=metadata, limits=limits, reader=reader, plugins=plugins)


def _child_main(connection, function: Callable[..., Any], args: tuple) -> None:
    try:
        outcome: tuple[str, Any] = ("ok", function(*args))
    except ReaderError as exc:
        outcome = ("reader_error", (str(exc), exc.reader))
    except BaseException as exc:  # noqa: BLE001 - reported to the parent, which raises it
        outcome = ("error", f"{type(exc).__name__}: {exc}")
    try:
        connection.send(outcome)
    finally:
        connection.close()


# Imported once in the fork server, so that each child starts with h5py and tifffile loaded.
_PRELOAD = ("hdf5", "tiff", "numpy_arrays", "exchange", "text_spectra")


def _isolation_context() -> Any:
    import multiprocessing

    module: Any = multiprocessing
    if multiprocessing.current_process().daemon:
        # A Celery prefork worker is a daemonic process, where the standard library refuses
        # to start children; billiard (Celery's own multiprocessing) allows them.
        import billiard

        module = billiard
    try:
        context = module.get_context("forkserver")
        context.set_forkserver_preload([f"labbook.datafiles.readers.{m}" for m in _PRELOAD])
    except ValueError:  # no fork server on this platform
        context = module.get_context("spawn")
    return context


def run_isolated(function: Callable[..., Any], args: tuple, *, timeout_s: float, what: str) -> Any:
    """Run ``function(*args)`` in a child process; its result, or :class:`ReaderError` when it
    raised, ran past ``timeout_s`` (the child is killed) or died (a crash in a C library).

    The child comes from a fork server (a clean process started once, with the readers
    imported), not from forking the caller: forking a threaded worker can deadlock.
    """
    context = _isolation_context()
    receiver, sender = context.Pipe(duplex=False)
    process = context.Process(target=_child_main, args=(sender, function, args), daemon=True)
    process.start()
    sender.close()
    try:
        if not receiver.poll(timeout_s):
            raise ReaderError(
                f"timeout: {what} took longer than {timeout_s:g} s and was stopped (a corrupt "
                "file can make a format library loop)"
            )
        try:
            kind, payload = receiver.recv()
        except EOFError:
            process.join(5)
            raise ReaderError(
                f"crashed: the reader process died while {what} (exit code {process.exitcode}); "
                "a corrupt file can crash a format library"
            ) from None
    finally:
        receiver.close()
        if process.is_alive():
            # SIGKILL: a library looping in C never returns to handle SIGTERM. billiard's
            # processes have no kill(), hence the fallback.
            getattr(process, "kill", process.terminate)()
        process.join(5)
    if kind == "reader_error":
        message, reader = payload
        raise ReaderError(message, reader=reader)
    if kind == "error":
        raise ReaderError(f"reader failed: {payload}")
    return payload


def _choose_builtin(source: Source, forced: str | None, warnings: list[str]) -> _Builtin:
    if forced is not None:
        if forced not in _BUILTINS:
            raise ReaderError(
                f"unknown reader {forced!r}; built-in readers: {', '.join(_BUILTINS)}"
            )
        return _BUILTINS[forced]
    head = source.head(4096)
    by_magic = _detect_by_magic(head)
    extension = source.extension
    by_extension = next((b.name for b in _BUILTINS.values() if extension in b.extensions), None)
    if by_magic is not None:
        if (
            by_extension is not None
            and by_extension != by_magic
            and not (by_magic == "exchange" and extension == ".zip")
        ):
            warnings.append(
                f"the extension {extension!r} suggests {by_extension}, the content is "
                f"{by_magic}; read as {by_magic}"
            )
        return _BUILTINS[by_magic]
    if by_extension is not None:
        return _BUILTINS[by_extension]
    shown = head[:8].hex(" ")
    raise ReaderError(
        f"unknown format: {source.name!r} (extension {extension or 'none'!r}, first bytes "
        f"{shown}) is none of HDF5, TIFF, NumPy .npy/.npz, labbook exchange or text spectra, "
        "and no reader plugin claimed it"
    )


def _try_plugins(
    source: Source, given: dict[str, Any], limits: ReaderLimits, warnings: list[str]
) -> tuple[ParsedFile | None, str]:
    available = _plugins()
    if not available:
        return None, ""
    data = source.read_bytes()
    for plugin in available:
        try:
            if plugin.takes_limits:
                result = plugin.function(source.name, data, dict(given), limits=limits)
            else:
                result = plugin.function(source.name, data, dict(given))
        except ReaderError as exc:
            # The plugin recognised its format and found the file broken: that is the answer.
            exc.reader = exc.reader or plugin.label
            raise
        except Exception as exc:  # noqa: BLE001 - a buggy plugin must not stop ingestion
            logger.error(
                "labbook reader plugin %r raised on %r and is skipped",
                plugin.name,
                source.name,
                exc_info=True,
            )
            warnings.append(f"plugin {plugin.name} failed ({type(exc).__name__}: {exc}); skipped")
            continue
        if result is None:
            continue
        if not isinstance(result, ParsedFile):
            warnings.append(
                f"plugin {plugin.name} returned {type(result).__name__}, not a ParsedFile; skipped"
            )
            continue
        return result, result.reader or plugin.label
    return None, ""


def _finish(
    parsed: ParsedFile,
    label: str,
    source: Source,
    sidecar: dict[str, Any] | None,
    upload: Mapping[str, Any] | None,
    warnings: list[str],
    limits: ReaderLimits,
) -> ParsedFile:
    """Coerce, overlay the sidecar and upload metadata, fill what the data says, validate."""
    # A built-in may hand over to another (an .npz that is an exchange archive) and say so.
    parsed.reader = parsed.reader or label
    try:
        parsed.channels = {
            n: as_measurement(a, what=f"channel {n!r}") for n, a in parsed.channels.items()
        }
        parsed.axes = {n: as_measurement(a, what=f"axis {n!r}") for n, a in parsed.axes.items()}
    except AttributeError as exc:
        raise ReaderError("invalid result: channels and axes must be dicts", reader=label) from exc
    except ReaderError as exc:
        exc.reader = label
        raise
    parsed.warnings = warnings + list(parsed.warnings)
    metadata = dict(parsed.metadata)
    for origin, given in (("sidecar", sidecar), ("upload metadata", upload)):
        if not given:
            continue
        values, problems = normalise_metadata(given, source=origin)
        parsed.warnings += problems
        for key, value in values.items():
            if key == "kind":
                continue
            if key in metadata and metadata[key] != value:
                parsed.warnings.append(
                    f"{origin}: {key} {jsonable(value)!r} overrides the file's "
                    f"{jsonable(metadata[key])!r}"
                )
            metadata[key] = value
        kind = values.get("kind")
        if kind and kind != parsed.kind:
            _override_kind(parsed, kind, origin)
    if sidecar:
        parsed.raw_header.setdefault("sidecar", sidecar)
    _fill_from_data(parsed, metadata)
    parsed.metadata = _checked_metadata(metadata, parsed)
    for name in list(parsed.channels) + list(parsed.axes):
        parsed.units.setdefault(name, "")
    parsed.raw_header = jsonable(parsed.raw_header, max_items=4096)
    try:
        parsed.validate(limits)
    except ReaderError as exc:
        exc.reader = label
        raise
    return parsed


def _checked_metadata(metadata: dict[str, Any], parsed: ParsedFile) -> dict[str, Any]:
    """Every field once more through the normaliser, in its canonical name: a plugin's NaN
    bias or a "50" setpoint is dropped with a warning, never stored; names that are not
    labbook fields go to ``raw_header["metadata_extra"]``."""
    acquired = metadata.get("acquired_at")
    fields = {k: v for k, v in metadata.items() if k in CANONICAL_FIELDS and k != "acquired_at"}
    checked, problems = normalise_metadata(fields, source="metadata")
    parsed.warnings += problems
    checked.pop("kind", None)
    extra = {k: v for k, v in metadata.items() if k not in CANONICAL_FIELDS}
    if extra:
        parsed.raw_header.setdefault("metadata_extra", jsonable(extra))
        parsed.warnings.append(f"metadata names that are not labbook fields: {sorted(extra)}")
    out = {key: jsonable(value) for key, value in checked.items()}
    if isinstance(acquired, datetime) and acquired.utcoffset() is not None:
        out["acquired_at"] = acquired.astimezone(UTC)
    elif acquired is not None:
        parsed.warnings.append(f"acquired_at {acquired!r} is not an aware datetime; dropped")
    return out


def _override_kind(parsed: ParsedFile, kind: str, origin: str) -> None:
    """Take a kind the sidecar or upload states, when the arrays can be that kind (an image
    may be a topograph, a current image or other; a spectrum needs its sweep axis)."""
    first = next(iter(parsed.channels.values()))
    fits = first.ndim in _KIND_NDIM[kind]
    if fits and kind in ("spectrum", "grid"):
        fits = any(axis.shape[0] == first.shape[-1] for axis in parsed.axes.values())
    if fits:
        parsed.kind = kind
    else:
        parsed.warnings.append(
            f"{origin}: kind {kind!r} does not fit the {first.ndim}-D data; kept {parsed.kind!r}"
        )


def _fill_from_data(parsed: ParsedFile, metadata: dict[str, Any]) -> None:
    """Fields the arrays state themselves: pixels of an image or grid, the sweep of a
    spectrum; a header that disagrees with the data is reported, the data wins."""
    first = next(iter(parsed.channels.values()))
    if parsed.kind in ("topograph", "current", "grid") or (
        parsed.kind == "other" and first.ndim >= 2
    ):
        pixels = [int(first.shape[1]), int(first.shape[0])]
        stated = metadata.get("pixels")
        if stated is not None and list(stated) != pixels:
            parsed.warnings.append(
                f"header pixels {stated} differ from the data's {pixels}; kept the data's"
            )
        metadata["pixels"] = pixels
    if parsed.kind in ("spectrum", "grid"):
        length = first.shape[-1]
        bias = parsed.axes.get("bias_v")
        if bias is not None and bias.shape[0] == length:
            finite = bias[np.isfinite(bias)]
            if finite.size:
                metadata.setdefault(
                    "sweep_start_v", float(bias[0]) if np.isfinite(bias[0]) else float(finite[0])
                )
                metadata.setdefault(
                    "sweep_end_v", float(bias[-1]) if np.isfinite(bias[-1]) else float(finite[-1])
                )
        stated = metadata.get("sweep_points")
        if stated is not None and stated != length:
            parsed.warnings.append(
                f"header sweep_points {stated} differs from the data's {length}; kept the data's"
            )
        metadata["sweep_points"] = int(length)
    channel_name = metadata.get("channel_name")
    if channel_name is None:
        metadata["channel_name"] = next(iter(parsed.channels))
