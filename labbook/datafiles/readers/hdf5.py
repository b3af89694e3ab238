"""HDF5 files (h5py), with the NeXus ``NXdata`` layout understood.

What is read:

* **The data.** The ``NXdata`` group the NeXus ``default`` attributes point to (root →
  entry → data), else the first ``NXdata`` group in the file. Its ``signal`` attribute names
  the channel (or, in the older style, the dataset with ``signal=1``); ``auxiliary_signals``
  and the signals of other ``NXdata`` groups of the same shape are further channels. The
  ``axes`` attribute (``"."`` for a dimension without one) and ``<axis>_indices`` attributes
  give the axes; every dataset's ``units`` attribute its unit (converted to SI). A file with
  no ``NXdata`` is read by shape: the first 2-D (or 3-D) numeric dataset and every dataset of
  its shape are channels; without one, 1-D datasets with a bias-like axis make a spectrum.
* **The metadata.** Every attribute (except the NeXus structural ones) and every small scalar
  or string dataset becomes a header entry keyed by its path, with its ``units`` attribute,
  and goes through :func:`~labbook.datafiles.readers.normalise.normalise_metadata`
  (``entry/start_time`` → ``acquired_at``, ``entry/sample/temperature`` → ``temperature_k``
  … the mapping table is in docs/readers.md). Everything is listed in the raw header.

What is refused, because an HDF5 file can point outside itself: datasets whose data live in
another file (external storage, virtual datasets) — reading them would read files of the
server; external links are never followed (listed, with a warning). Compressed datasets are
read only with the deflate filter (plus shuffle/fletcher32/n-bit/scale-offset), and every
deflated chunk is first inflated with a bound of its nominal size, since HDF5's own inflate
grows its buffer without limit (a chunk can be a zip bomb).
"""

from __future__ import annotations

import math
import re
import zlib
from collections.abc import Mapping
from typing import Any

import numpy as np

from labbook.datafiles.readers import (
    ElementBudget,
    ParsedFile,
    ReaderError,
    ReaderLimits,
    Source,
    check_dtype,
    infer_kind,
)
from labbook.datafiles.readers.normalise import (
    axis_name,
    jsonable,
    normalise_metadata,
    snake,
    to_si,
)

__all__ = ["read"]

# NeXus attributes that describe the layout, not the acquisition.
_STRUCTURAL = {
    "nx_class",
    "signal",
    "axes",
    "auxiliary_signals",
    "default",
    "units",
    "unit",
    "long_name",
    "interpretation",
    "target",
    "napitype",
    "primary",
    "axis",
    "file_name",
    "file_time",
    "hdf5_version",
    "h5py_version",
    "creator",
    "nexus_version",
    "class",
}
# HDF5 filter ids: deflate, shuffle, fletcher32, n-bit, scale-offset. Anything else (szip,
# LZF, blosc, zstd plugins …) cannot be inflated with a bound here.
_DEFLATE, _SHUFFLE, _FLETCHER32, _NBIT, _SCALEOFFSET = 1, 2, 3, 5, 6
_ALLOWED_FILTERS = {_DEFLATE, _SHUFFLE, _FLETCHER32, _NBIT, _SCALEOFFSET}
_MAX_ATTRIBUTE_ELEMENTS = 4096
_MAX_SCALAR_ELEMENTS = 16
_BIAS_NAMES = {"bias", "bias_v", "v", "voltage", "sample_bias", "tip_bias", "bias_voltage"}


def read(source: Source, given: Mapping[str, Any], limits: ReaderLimits) -> ParsedFile:
    import h5py

    # h5py does not close a file object it was given: the with-block does.
    with source.open() as stream:
        try:
            handle = h5py.File(stream, "r")
        except OSError as exc:
            raise _open_error(exc, source) from exc
        with handle as root:
            return _Reader(root, source, limits).read()


def _open_error(exc: OSError, source: Source) -> ReaderError:
    message = str(exc)
    truncated = re.search(r"eof = (\d+).*stored_eof = (\d+)", message)
    if truncated:
        return ReaderError(
            f"truncated: the HDF5 file is {int(truncated.group(1)):,} bytes, its superblock "
            f"says {int(truncated.group(2)):,}"
        )
    if "truncated" in message.lower():
        return ReaderError(f"truncated: HDF5 file {source.name!r}: {message}")
    return ReaderError(f"corrupt HDF5 file {source.name!r}: {message}")


def _text(value: Any) -> str:
    if isinstance(value, bytes | np.bytes_):
        return bytes(value).decode("utf-8", errors="replace")
    if isinstance(value, np.ndarray) and value.size == 1:
        return _text(value.reshape(()).item())
    return str(value)


def _names(value: Any) -> list[str]:
    """An ``axes``/``auxiliary_signals`` attribute as a list of names (string array, one string
    with ``:``/``,`` separators in the older style, or a single name)."""
    if isinstance(value, np.ndarray) and value.ndim > 0:
        return [_text(item) for item in value.tolist()]
    if isinstance(value, list | tuple):
        return [_text(item) for item in value]
    text = _text(value).strip()
    return [part.strip() for part in re.split(r"[:,\s]+", text) if part.strip()] if text else []


class _Reader:
    def __init__(self, root, source: Source, limits: ReaderLimits) -> None:
        import h5py

        self.h5py = h5py
        self.root = root
        self.source = source
        self.limits = limits
        self.budget = ElementBudget(limits)
        self.warnings: list[str] = []
        self.objects: list[tuple[str, Any]] = []
        self.external_links: list[dict[str, str]] = []
        self.scan_size: list[float] | None = None

    # -- the whole file --------------------------------------------------------------------------

    def read(self) -> ParsedFile:
        self._inventory()
        channels, axes, units, primary = self._data()
        header, header_units, raw_attrs, datasets = self._header()
        metadata, problems = normalise_metadata(header, units=header_units, source="HDF5")
        self.warnings += problems
        hint = metadata.pop("kind", None)
        kind = infer_kind(channels, units, axes)
        if hint and hint != kind:
            # The file's own word wins when the arrays fit it (an image may be "other").
            first = next(iter(channels.values()))
            if (hint in ("topograph", "current") and first.ndim == 2) or hint == "other":
                kind = hint
        if "scan_size_m" not in metadata and self.scan_size is not None:
            metadata["scan_size_m"] = self.scan_size
        if "channel_name" not in metadata:
            metadata["channel_name"] = next(iter(channels))
        raw = {
            "data_group": primary,
            "attributes": raw_attrs,
            "datasets": datasets,
        }
        if self.external_links:
            raw["external_links"] = self.external_links
        return ParsedFile(
            kind=kind,
            channels=channels,
            axes=axes,
            units=units,
            metadata=metadata,
            raw_header=raw,
            warnings=self.warnings,
        )

    def _inventory(self) -> None:
        """Every object once (HDF5 visits by address, so link cycles end), with the refusals
        of the module docstring applied before any data are read."""
        h5py = self.h5py
        count = 0

        def visit(name: str, obj: Any) -> Any:
            nonlocal count
            count += 1
            if count > self.limits.max_objects:
                return True
            if isinstance(obj, h5py.Dataset):
                if obj.is_virtual:
                    raise ReaderError(
                        f"refused: dataset /{name} is a virtual dataset whose data live in other "
                        "files; labbook reads self-contained files only"
                    )
                if obj.external:
                    raise ReaderError(
                        f"refused: dataset /{name} keeps its data in an external file "
                        f"({_text(obj.external[0][0])!r}); labbook reads self-contained files only"
                    )
            self.objects.append((name, obj))
            return None

        def visit_link(name: str, link: Any) -> Any:
            if isinstance(link, h5py.ExternalLink):
                self.external_links.append(
                    {"path": f"/{name}", "file": _text(link.filename), "target": _text(link.path)}
                )
            return None

        try:
            stopped = self.root.visititems(visit)
            self.root.visititems_links(visit_link)
        except ReaderError:
            raise
        except (OSError, RuntimeError, KeyError, ValueError) as exc:
            raise ReaderError(f"corrupt HDF5 file: cannot walk its objects ({exc})") from exc
        if stopped:
            raise ReaderError(
                f"refused: the HDF5 file has more than {self.limits.max_objects:,} objects"
            )
        if self.external_links:
            self.warnings.append(
                f"{len(self.external_links)} external link(s) to other files were not followed"
            )

    # -- safe access -----------------------------------------------------------------------------

    def _child(self, group: Any, name: str, depth: int = 0) -> Any:
        """``group[name]`` through hard and soft links only: an external link (or a soft link
        through one) would make HDF5 open another file of the server."""
        h5py = self.h5py
        if depth > 8:
            raise ReaderError(f"corrupt: soft links around {name!r} nest too deep")
        current = self.root if name.startswith("/") else group
        for part in [p for p in name.split("/") if p and p != "."]:
            if not isinstance(current, h5py.Group):
                raise ReaderError(f"corrupt: {name!r} goes through a dataset")
            link = current.get(part, getlink=True)
            if link is None:
                raise ReaderError(f"corrupt: {current.name}/{part} does not exist")
            if isinstance(link, h5py.ExternalLink):
                raise ReaderError(
                    f"refused: {current.name}/{part} is an external link to "
                    f"{_text(link.filename)!r}; labbook reads self-contained files only"
                )
            if isinstance(link, h5py.SoftLink):
                current = self._child(current, _text(link.path), depth + 1)
            else:
                current = current[part]
        return current

    def _check_filters(self, dataset: Any, what: str) -> None:
        plist = dataset.id.get_create_plist()
        filters = [plist.get_filter(index) for index in range(plist.get_nfilters())]
        codes = [code for code, *_ in filters]
        unknown = [
            f"{_text(name) or code}" for code, _, _, name in filters if code not in _ALLOWED_FILTERS
        ]
        if unknown:
            raise ReaderError(
                f"unsupported: {what} is compressed with {', '.join(unknown)}; labbook reads "
                "HDF5 datasets that are uncompressed or deflate (gzip) compressed"
            )
        if _DEFLATE not in codes:
            return
        position = codes.index(_DEFLATE)
        if any(code != _FLETCHER32 for code in codes[position + 1 :]):
            raise ReaderError(f"unsupported: {what} applies a filter after deflate")
        nominal = math.prod(dataset.chunks) * dataset.dtype.itemsize
        for index in range(dataset.id.get_num_chunks()):
            info = dataset.id.get_chunk_info(index)
            if info.filter_mask & (1 << position):
                continue  # deflate skipped for this chunk: stored raw
            _, raw = dataset.id.read_direct_chunk(info.chunk_offset)
            inflater = zlib.decompressobj()
            try:
                out = inflater.decompress(raw, nominal + 1)
            except zlib.error as exc:
                raise ReaderError(f"corrupt: {what} chunk {info.chunk_offset}: {exc}") from exc
            if len(out) > nominal or inflater.unconsumed_tail:
                raise ReaderError(
                    f"refused: {what} chunk {info.chunk_offset} inflates beyond its nominal "
                    f"{nominal:,} bytes (a compression bomb)"
                )

    def _array(self, dataset: Any, what: str) -> np.ndarray:
        check_dtype(dataset.dtype, what=what)
        if dataset.ndim == 0:
            raise ReaderError(f"unsupported: {what} is a scalar, not a measured array")
        self.budget.claim(dataset.shape, what=what)
        if dataset.chunks is not None:
            self._check_filters(dataset, what)
        try:
            return np.asarray(dataset[()])
        except OSError as exc:
            raise ReaderError(f"corrupt or truncated: cannot read {what}: {exc}") from exc

    # -- data ------------------------------------------------------------------------------------

    def _data(self) -> tuple[dict, dict, dict, str | None]:
        group = self._primary_nxdata()
        if group is None:
            channels, axes, units = self._by_shape()
            return channels, axes, units, None
        return (*self._from_nxdata(group), group.name)

    def _nx_class(self, obj: Any) -> str:
        value = obj.attrs.get("NX_class") if "NX_class" in obj.attrs else None
        return _text(value) if value is not None else ""

    def _primary_nxdata(self) -> Any:
        h5py = self.h5py
        # NeXus "default" chain: root → NXentry → NXdata.
        current = self.root
        for _ in range(4):
            if self._nx_class(current) == "NXdata":
                return current
            if "default" not in current.attrs:
                break
            try:
                target = self._child(current, _text(current.attrs["default"]))
            except ReaderError as exc:
                self.warnings.append(f"NeXus default attribute of {current.name} not used: {exc}")
                break
            if not isinstance(target, h5py.Group):
                break
            current = target
        groups = [obj for _, obj in self.objects if isinstance(obj, h5py.Group)]
        return next((group for group in groups if self._nx_class(group) == "NXdata"), None)

    def _signal_name(self, group: Any) -> str:
        h5py = self.h5py
        if "signal" in group.attrs:
            return _text(group.attrs["signal"])
        for name in group:
            link = group.get(name, getlink=True)
            if isinstance(link, h5py.HardLink):
                obj = group[name]
                if (
                    isinstance(obj, h5py.Dataset)
                    and "signal" in obj.attrs
                    and _text(obj.attrs["signal"]).strip() in ("1", "True", "true")
                ):
                    return name
        raise ReaderError(
            f"corrupt NeXus: NXdata group {group.name} names no signal (a 'signal' attribute)"
        )

    def _from_nxdata(self, group: Any) -> tuple[dict, dict, dict]:
        h5py = self.h5py
        signal_name = self._signal_name(group)
        signal = self._child(group, signal_name)
        if not isinstance(signal, h5py.Dataset):
            raise ReaderError(f"corrupt NeXus: signal {signal_name!r} of {group.name} is a group")
        names = [signal_name]
        if "auxiliary_signals" in group.attrs:
            names += [n for n in _names(group.attrs["auxiliary_signals"]) if n not in names]
        channels: dict[str, np.ndarray] = {}
        units: dict[str, str] = {}
        sources: list[str] = []
        for name in names:
            dataset = self._child(group, name)
            if not isinstance(dataset, h5py.Dataset) or dataset.shape != signal.shape:
                self.warnings.append(f"auxiliary signal {name!r} of {group.name} skipped (shape)")
                continue
            self._add_channel(channels, units, name, dataset, sources)
        # Further NXdata groups with a signal of the same shape: more channels of one scan.
        for _, other in self.objects:
            if (
                isinstance(other, h5py.Group)
                and other.name != group.name
                and self._nx_class(other) == "NXdata"
                and "signal" in other.attrs
            ):
                try:
                    name = _text(other.attrs["signal"])
                    dataset = self._child(other, name)
                except ReaderError as exc:
                    self.warnings.append(f"NXdata {other.name} skipped: {exc}")
                    continue
                if isinstance(dataset, h5py.Dataset) and dataset.shape == signal.shape:
                    label = (
                        name
                        if name not in channels
                        else f"{other.name.strip('/').split('/')[-1]}_{name}"
                    )
                    self._add_channel(channels, units, label, dataset, sources)
        axes, axis_units, dim_of = self._nx_axes(group, signal)
        units.update(axis_units)
        sweep = next((dim_of[name] for name in axes if units.get(name) == "V"), None)
        if signal.ndim >= 2:
            spatial = [dim for dim in range(signal.ndim) if dim != sweep][:2]
            self.scan_size = _scan_size_from_axes(axes, axis_units, dim_of, spatial, signal.shape)
        if signal.ndim == 3 and sweep is not None and sweep != 2:
            # Grids are kept (y, x, sweep): the voltage axis's dimension goes last.
            channels = {name: np.moveaxis(array, sweep, -1) for name, array in channels.items()}
        return channels, axes, units

    def _add_channel(self, channels, units, name: str, dataset: Any, sources: list[str]) -> None:
        if dataset.name in sources:
            return
        sources.append(dataset.name)
        array = self._array(dataset, f"dataset {dataset.name}")
        if array.ndim > 3:
            raise ReaderError(f"unsupported: dataset {dataset.name} is {array.ndim}-D")
        unit = _text(dataset.attrs["units"]) if "units" in dataset.attrs else None
        values, si = to_si(array, unit)
        clean = re.sub(r"[\x00-\x1f/\\]", "_", name)[:128] or "signal"
        channels[clean] = values
        units[clean] = si

    def _nx_axes(self, group: Any, signal: Any) -> tuple[dict, dict, dict]:
        h5py = self.h5py
        if "axes" in group.attrs:
            listed = _names(group.attrs["axes"])
        elif "axes" in signal.attrs:
            listed = _names(signal.attrs["axes"])
        else:
            listed = []
        axes: dict[str, np.ndarray] = {}
        units: dict[str, str] = {}
        dim_of: dict[str, int] = {}
        for position, name in enumerate(listed):
            if name in (".", "") or name in dim_of.values():
                continue
            key = f"{name}_indices"
            if key in group.attrs:
                indices = np.atleast_1d(np.asarray(group.attrs[key])).astype(int).tolist()
            else:
                indices = [position]
            try:
                dataset = self._child(group, name)
            except ReaderError as exc:
                self.warnings.append(f"axis {name!r} of {group.name} skipped: {exc}")
                continue
            if not isinstance(dataset, h5py.Dataset) or dataset.ndim != 1 or len(indices) != 1:
                self.warnings.append(
                    f"axis {name!r} of {group.name} skipped: only 1-D axes of one dimension "
                    "are read"
                )
                continue
            dim = indices[0]
            if not 0 <= dim < signal.ndim:
                self.warnings.append(f"axis {name!r}: index {dim} outside the signal's dimensions")
                continue
            values = self._array(dataset, f"axis {dataset.name}")
            length = signal.shape[dim]
            if values.shape[0] == length + 1:
                values = (values[:-1] + values[1:]) / 2  # histogram bin edges → centres
                self.warnings.append(f"axis {name!r} gives bin edges; read as bin centres")
            if values.shape[0] != length:
                self.warnings.append(
                    f"axis {name!r} has {values.shape[0]} values for a dimension of {length}; "
                    "skipped"
                )
                continue
            unit = _text(dataset.attrs["units"]) if "units" in dataset.attrs else None
            values, si = to_si(values, unit)
            canonical = axis_name(name, si)
            if canonical in axes:
                canonical = snake(name) or f"axis{dim}"
            axes[canonical] = values
            units[canonical] = si
            dim_of[canonical] = dim
        return axes, units, dim_of

    def _by_shape(self) -> tuple[dict, dict, dict]:
        h5py = self.h5py
        numeric = [
            (name, obj)
            for name, obj in self.objects
            if isinstance(obj, h5py.Dataset) and obj.dtype.kind in "biuf" and obj.ndim >= 1
        ]
        channels: dict[str, np.ndarray] = {}
        units: dict[str, str] = {}
        axes: dict[str, np.ndarray] = {}
        sources: list[str] = []
        images = [(n, o) for n, o in numeric if o.ndim in (2, 3)]
        if images:
            shape = images[0][1].shape
            for name, obj in images:
                if obj.shape == shape:
                    self._add_channel(channels, units, name.split("/")[-1], obj, sources)
            self.warnings.append("no NeXus NXdata group: channels chosen by shape")
            return channels, axes, units
        lines = [(n, o) for n, o in numeric if o.ndim == 1]
        bias = next((pair for pair in lines if snake(pair[0].split("/")[-1]) in _BIAS_NAMES), None)
        if bias is None:
            raise ReaderError(
                "unsupported: the HDF5 file has no NeXus NXdata group and no image, grid or "
                "spectrum (1-D data with a bias dataset) to read"
            )
        axis = self._array(bias[1], f"dataset /{bias[0]}")
        unit = _text(bias[1].attrs["units"]) if "units" in bias[1].attrs else "V"
        values, si = to_si(axis, unit)
        axes[axis_name(bias[0].split("/")[-1], si)] = values
        units[axis_name(bias[0].split("/")[-1], si)] = si
        for name, obj in lines:
            if obj is not bias[1] and obj.shape == bias[1].shape:
                self._add_channel(channels, units, name.split("/")[-1], obj, sources)
        if not channels:
            raise ReaderError("unsupported: the HDF5 file has a bias dataset but no data beside it")
        self.warnings.append("no NeXus NXdata group: a spectrum chosen by dataset names")
        return channels, axes, units

    # -- header ----------------------------------------------------------------------------------

    def _header(self) -> tuple[dict, dict, dict, dict]:
        h5py = self.h5py
        header: dict[str, Any] = {}
        header_units: dict[str, str] = {}
        raw_attrs: dict[str, Any] = {}
        datasets: dict[str, Any] = {}
        for name, obj in [("", self.root), *self.objects]:
            path = f"/{name}"
            attrs = self._attributes(obj, path)
            if attrs:
                raw_attrs[path] = jsonable(attrs)
            for attr, value in attrs.items():
                if attr.lower() in _STRUCTURAL or attr.lower().endswith(
                    ("_indices", "_units", "_unit")
                ):
                    continue
                key = f"{name}/{attr}" if name else attr
                header[key] = value
                for suffix in ("_units", "_unit"):
                    if f"{attr}{suffix}" in attrs:
                        header_units[key] = _text(attrs[f"{attr}{suffix}"])
            if isinstance(obj, h5py.Dataset):
                entry: dict[str, Any] = {"shape": list(obj.shape), "dtype": str(obj.dtype)}
                if obj.chunks is not None:
                    entry["chunks"] = list(obj.chunks)
                if obj.compression:
                    entry["compression"] = str(obj.compression)
                value = self._small_value(obj)
                if value is not None:
                    entry["value"] = jsonable(value)
                    header[name] = value
                    if "units" in obj.attrs:
                        header_units[name] = _text(obj.attrs["units"])
                datasets[path] = entry
        return header, header_units, raw_attrs, datasets

    def _attributes(self, obj: Any, path: str) -> dict[str, Any]:
        h5py = self.h5py
        out: dict[str, Any] = {}
        try:
            names = list(obj.attrs)
        except (OSError, RuntimeError) as exc:
            self.warnings.append(f"attributes of {path} unreadable: {exc}")
            return out
        for attr in names[: self.limits.max_objects]:
            try:
                space = h5py.h5a.open(obj.id, attr.encode()).get_space()
                points = space.get_simple_extent_npoints()
                if points > _MAX_ATTRIBUTE_ELEMENTS:
                    out[attr] = f"<{points:,} elements, not read>"
                    continue
                out[attr] = obj.attrs[attr]
            except (OSError, RuntimeError, TypeError, ValueError, KeyError) as exc:
                out[attr] = f"<unreadable: {exc}>"
        return out

    def _small_value(self, dataset: Any) -> Any:
        """The value of a small scalar or string dataset (NeXus keeps metadata as datasets);
        None for anything else. Chunked datasets are skipped: a chunk may be a bomb and a
        header value is never worth the risk."""
        h5py = self.h5py
        if dataset.chunks is not None or dataset.size > _MAX_SCALAR_ELEMENTS:
            return None
        kind = dataset.dtype.kind
        if kind not in "biufS" and h5py.check_string_dtype(dataset.dtype) is None:
            return None
        try:
            value = dataset[()]
        except (OSError, TypeError, ValueError) as exc:
            self.warnings.append(f"dataset {dataset.name} unreadable: {exc}")
            return None
        if isinstance(value, np.ndarray) and value.size == 1:
            value = value.reshape(()).item()
        return value


def _scan_size_from_axes(
    axes: Mapping[str, np.ndarray],
    units: Mapping[str, str],
    dim_of: Mapping[str, int],
    spatial: list[int],
    shape: tuple[int, ...],
) -> list[float] | None:
    """``[x, y]`` scan size from evenly spaced pixel-centre axes in metres: n · step per side.

    ``spatial`` are the (y, x) dimensions of the signal (a grid's sweep dimension left out).
    """
    if len(spatial) != 2:
        return None
    sizes: dict[int, float] = {}
    for name, values in axes.items():
        dim = dim_of.get(name)
        if units.get(name) != "m" or dim not in spatial or values.shape[0] < 2:
            continue
        steps = np.diff(values.astype(np.float64))
        if not np.all(np.isfinite(steps)) or not np.allclose(steps, steps[0], rtol=1e-3):
            continue
        sizes[dim] = abs(float(steps[0])) * shape[dim]
    y_dim, x_dim = spatial
    if y_dim in sizes and x_dim in sizes:
        return [sizes[x_dim], sizes[y_dim]]
    return None
