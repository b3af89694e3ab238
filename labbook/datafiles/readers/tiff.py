"""TIFF images (tifffile): each page a channel, the tags in the raw header, a JSON object in
the ImageDescription as the metadata.

A TIFF is an image and no more: its units, scan size and bias travel in a JSON description
(tifffile writes ``metadata={...}`` there) or in a sidecar (FIELD §5: "metadata is lost
without a sidecar"). The description may hold the metadata fields by any name
:func:`~labbook.datafiles.readers.normalise.normalise_metadata` knows, and

* ``channels``: page names in page order (``["z_forward", "z_backward"]``), or a list of
  ``{"name": …, "unit": …}``;
* ``units``: ``{channel: unit}``, or ``unit`` for every page;
* ``kind``: ``topograph``, ``current`` or ``other``.

Safety: every page's shape and dtype are checked before decoding; every strip or tile must
lie inside the file (else "truncated"); tifffile's own complaints (it logs and drops pages
whose IFD lies past the end) are errors here, never a silently shorter file; only
uncompressed and deflate pages are read, and each deflate strip is first inflated with a
bound of its nominal size.
"""

from __future__ import annotations

import logging
import math
import re
import struct
import threading
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
    jsonable,
    loads_json_object,
    normalise_metadata,
    snake,
    to_si,
)

__all__ = ["read"]

_NONE, _ADOBE_DEFLATE, _DEFLATE = 1, 8, 32946
_STRUCTURAL = {"channels", "units", "unit", "kind", "shape", "axes"}
# Tags whose values are per-strip lists: summarised in the raw header, not copied.
_BULKY_TAGS = {"StripOffsets", "StripByteCounts", "TileOffsets", "TileByteCounts", "JPEGTables"}


class _Complaints(logging.Handler):
    """tifffile's warnings and errors during one read, in this thread only."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.thread = threading.get_ident()
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        if record.thread == self.thread:
            self.messages.append(record.getMessage())


def read(source: Source, given: Mapping[str, Any], limits: ReaderLimits) -> ParsedFile:
    import tifffile

    complaints = _Complaints()
    log = logging.getLogger("tifffile")
    log.addHandler(complaints)
    try:
        try:
            with source.open() as stream, tifffile.TiffFile(stream) as tif:
                return _read(tif, source, given, limits, complaints)
        except tifffile.TiffFileError as exc:
            raise _structure_error(source, str(exc)) from exc
    finally:
        log.removeHandler(complaints)


def _structure_error(source: Source, message: str) -> ReaderError:
    head = source.head(16)
    offset = _first_ifd_offset(head)
    if offset is not None:
        # A classic IFD is a 2-byte entry count, 12 bytes an entry and a 4-byte next offset.
        entries = source.head(offset + 2)[offset : offset + 2]
        count = int.from_bytes(entries, "little" if head[:2] == b"II" else "big")
        if len(entries) < 2 or offset + 2 + 12 * count + 4 > source.size:
            return ReaderError(
                f"truncated: the TIFF's first image directory (at byte {offset:,}) runs past the "
                f"end of the file ({source.size:,} bytes)"
            )
    return ReaderError(f"corrupt TIFF: {message}")


def _first_ifd_offset(head: bytes) -> int | None:
    if head[:4] in (b"II*\x00", b"MM\x00*") and len(head) >= 8:
        return struct.unpack("<I" if head[:2] == b"II" else ">I", head[4:8])[0]
    if head[:4] in (b"II+\x00", b"MM\x00+") and len(head) >= 16:
        return struct.unpack("<Q" if head[:2] == b"II" else ">Q", head[8:16])[0]
    return None


def _raise_complaints(complaints: _Complaints, source: Source) -> None:
    if not complaints.messages:
        return
    message = complaints.messages[0]
    beyond = re.search(r"offset (\d+)", message)
    if beyond and int(beyond.group(1)) >= source.size:
        raise ReaderError(
            f"truncated: a TIFF image directory at byte {int(beyond.group(1)):,} lies past the "
            f"end of the file ({source.size:,} bytes)"
        )
    raise ReaderError(f"corrupt TIFF: {message}")


def _read(tif, source: Source, given, limits: ReaderLimits, complaints: _Complaints) -> ParsedFile:
    pages = []
    for index, page in enumerate(tif.pages):
        if index >= limits.max_pages:
            raise ReaderError(f"refused: the TIFF has more than {limits.max_pages} pages")
        pages.append(page)
    _raise_complaints(complaints, source)
    if not pages:
        raise ReaderError("corrupt TIFF: no image pages")
    first_description = _description(pages[0])
    described: dict[str, Any] = {}
    raw: dict[str, Any] = {}
    warnings: list[str] = []
    if first_description:
        raw["description"] = first_description[: limits.max_header_bytes]
        if first_description.lstrip().startswith("{"):
            try:
                described = loads_json_object(
                    first_description,
                    what="the TIFF ImageDescription",
                    max_bytes=limits.max_header_bytes,
                )
            except ValueError as exc:
                warnings.append(f"ImageDescription looks like JSON but is not: {exc}")
    structure = {**described, **{k: v for k, v in given.items() if k in _STRUCTURAL}}

    budget = ElementBudget(limits)
    data_pages = [page for page in pages if not _is_thumbnail(page)]
    if len(data_pages) < len(pages):
        warnings.append(f"{len(pages) - len(data_pages)} reduced-resolution page(s) skipped")
    names, units = _names_and_units(structure, data_pages)
    channels: dict[str, np.ndarray] = {}
    out_units: dict[str, str] = {}
    page_tags: list[dict[str, Any]] = []
    for index, (page, name) in enumerate(zip(data_pages, names, strict=True)):
        what = f"TIFF page {index}"
        array = _page_array(page, what, source, budget)
        _raise_complaints(complaints, source)
        values, unit = to_si(array, units.get(name))
        channels[name] = values
        out_units[name] = unit
        page_tags.append(_tags(page))
    raw["pages"] = page_tags
    if described:
        raw["description_json"] = described

    header = {k: v for k, v in described.items() if k not in _STRUCTURAL}
    metadata, problems = normalise_metadata(header, source="TIFF description")
    warnings += problems
    if "acquired_at" not in metadata:
        stamp = page_tags[0].get("DateTime") if page_tags else None
        if isinstance(stamp, str):
            # TIFF's DateTime is "YYYY:MM:DD HH:MM:SS" and carries no zone.
            iso = re.sub(r"^(\d{4}):(\d{2}):(\d{2})", r"\1-\2-\3", stamp.strip())
            found, more = normalise_metadata(
                {
                    "acquired_at": iso,
                    **({"time_zone": header["time_zone"]} if "time_zone" in header else {}),
                },
                source="TIFF DateTime tag",
            )
            metadata.update(found)
            warnings += more
    kind = infer_kind(channels, out_units, {})
    hint = snake(str(structure.get("kind", "")))
    if hint in ("topograph", "current", "other") and len({a.shape for a in channels.values()}) == 1:
        kind = hint
    elif hint:
        warnings.append(f"TIFF description kind {structure.get('kind')!r} does not fit 2-D pages")
    return ParsedFile(
        kind=kind,
        channels=channels,
        units=out_units,
        metadata=metadata,
        raw_header=raw,
        warnings=warnings,
    )


def _description(page) -> str:
    tag = page.tags.get(270)
    if tag is None:
        return ""
    value = tag.value
    if isinstance(value, bytes):
        value = value.decode("utf-8", errors="replace")
    return str(value)


def _is_thumbnail(page) -> bool:
    return bool(int(getattr(page, "subfiletype", 0) or 0) & 1)


def _names_and_units(structure: Mapping[str, Any], pages: list) -> tuple[list[str], dict[str, str]]:
    count = len(pages)
    names: list[str] = []
    units: dict[str, str] = {}
    listed = structure.get("channels")
    if isinstance(listed, list) and len(listed) == count:
        for entry in listed:
            if isinstance(entry, Mapping):
                names.append(str(entry.get("name", "")))
                if isinstance(entry.get("unit"), str):
                    units[names[-1]] = entry["unit"]
            else:
                names.append(str(entry))
    elif isinstance(listed, Mapping) and len(listed) == count:
        for name, entry in listed.items():
            names.append(str(name))
            unit = entry.get("unit") if isinstance(entry, Mapping) else entry
            if isinstance(unit, str):
                units[str(name)] = unit
    else:
        for index, page in enumerate(pages):
            tag = page.tags.get(285)  # PageName
            names.append(str(tag.value) if tag is not None else f"page{index}")
    names = [
        re.sub(r"[\x00-\x1f/\\]", "_", name).strip()[:128] or f"page{i}"
        for i, name in enumerate(names)
    ]
    if len(set(names)) != len(names):
        names = [f"{name}_{index}" for index, name in enumerate(names)]
    stated = structure.get("units")
    if isinstance(stated, Mapping):
        units.update({str(k): v for k, v in stated.items() if isinstance(v, str)})
    one = structure.get("unit")
    if isinstance(one, str):
        for name in names:
            units.setdefault(name, one)
    return names, units


def _page_array(page, what: str, source: Source, budget: ElementBudget) -> np.ndarray:
    if page.samplesperpixel != 1:
        raise ReaderError(
            f"unsupported: {what} has {page.samplesperpixel} samples per pixel (a colour "
            "picture); labbook reads single-channel measurement images"
        )
    if getattr(page, "imagedepth", 1) not in (0, 1):
        raise ReaderError(f"unsupported: {what} is a volume (image depth {page.imagedepth})")
    dtype = page.dtype
    if dtype is None:
        raise ReaderError(
            f"unsupported dtype: {what} has {page.bitspersample}-bit samples of format "
            f"{page.sampleformat!r}"
        )
    check_dtype(np.dtype(dtype), what=what)
    shape = tuple(int(dim) for dim in page.shape)
    if len(shape) != 2:
        raise ReaderError(f"unsupported: {what} has shape {shape}; a page must be 2-D")
    budget.claim(shape, what=what)
    compression = int(page.compression)
    if compression not in (_NONE, _ADOBE_DEFLATE, _DEFLATE):
        raise ReaderError(
            f"unsupported: {what} uses TIFF compression {page.compression!r}; labbook reads "
            "uncompressed and deflate TIFF pages"
        )
    offsets, counts = page.dataoffsets, page.databytecounts
    itemsize = np.dtype(dtype).itemsize
    if page.is_tiled:
        nominal = page.tilewidth * page.tilelength * max(page.tiledepth, 1) * itemsize
    else:
        nominal = min(page.rowsperstrip, page.imagelength) * page.imagewidth * itemsize
    view = None
    for offset, count in zip(offsets, counts, strict=True):
        if offset + count > source.size or (count == 0 and compression == _NONE):
            raise ReaderError(
                f"truncated: {what} has image data at bytes {offset:,}–{offset + count:,}, the "
                f"file has {source.size:,} bytes"
            )
        if compression != _NONE:
            if view is None:
                view = memoryview(source.read_bytes())
            inflater = zlib.decompressobj()
            try:
                out = inflater.decompress(view[offset : offset + count], nominal + 1)
            except zlib.error as exc:
                raise ReaderError(f"corrupt: {what} has a damaged deflate strip ({exc})") from exc
            if len(out) > nominal or inflater.unconsumed_tail:
                raise ReaderError(
                    f"refused: {what} has a strip that inflates beyond its nominal {nominal:,} "
                    "bytes (a compression bomb)"
                )
    if compression == _NONE and sum(counts) < math.prod(shape) * itemsize:
        raise ReaderError(
            f"truncated: {what} stores {sum(counts):,} bytes for a {shape} {np.dtype(dtype)} image"
        )
    try:
        return np.asarray(page.asarray())
    except (ValueError, OSError, RuntimeError, EOFError) as exc:
        raise ReaderError(f"corrupt or truncated: cannot decode {what}: {exc}") from exc


def _tags(page) -> dict[str, Any]:
    tags: dict[str, Any] = {}
    for tag in page.tags.values():
        if tag.name in _BULKY_TAGS:
            tags[tag.name] = f"<{len(tag.value) if hasattr(tag.value, '__len__') else 1} values>"
            continue
        value = tag.value
        if hasattr(value, "name") and hasattr(value, "value"):  # enums: their name
            value = value.name
        tags[tag.name] = jsonable(value, max_items=64, max_chars=8192)
    return tags
