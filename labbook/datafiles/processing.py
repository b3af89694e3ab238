"""What a worker does with a stored file: read it, compute its statistics and thumbnail with
the science library, resolve its lineage. The numbers come from ``labbook.science``; this
module only decides which function applies to which kind of data."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np

from labbook.datafiles.readers import ParsedFile
from labbook.science import images, spectra, thumbnails

# Metadata a caller may send with a file that the readers' normalisation does not produce.
_PASSTHROUGH = ("instrument", "sample", "tip", "operator", "coverage_threshold_m")


@dataclass
class Analysis:
    kind: str
    metadata: dict[str, Any]
    stats: dict[str, Any] = field(default_factory=dict)
    thumbnail: bytes | None = None


def _first_image(parsed: ParsedFile) -> tuple[str, np.ndarray] | None:
    preferred = parsed.metadata.get("channel_name")
    if preferred in parsed.channels and parsed.channels[preferred].ndim == 2:
        return preferred, parsed.channels[preferred]
    for name, array in parsed.channels.items():
        if array.ndim == 2:
            return name, array
    return None


def _spacing(metadata: dict[str, Any], shape: tuple[int, int]) -> tuple[float, float]:
    """Pixel size (m) from the scan size and pixel count; 1 (pixel units) when unknown."""
    size = metadata.get("scan_size_m")
    if (
        isinstance(size, list | tuple)
        and len(size) == 2
        and all(isinstance(v, int | float) and v > 0 for v in size)
    ):
        ny, nx = shape
        return float(size[0]) / nx, float(size[1]) / ny
    return 1.0, 1.0


def _flat_image_stats(full: dict[str, Any]) -> dict[str, Any]:
    """DESIGN §4 answer keys (mean, std, rq, ra, min, max, coverage_fraction, …) with the rest."""
    roughness = full.get("roughness") or {}
    lines = full.get("roughness_lines") or {}
    flat = {key: full.get(key) for key in ("mean", "std", "min", "max")}
    flat.update({key: roughness.get(key) for key in ("rq", "ra", "rsk", "rku", "rz")})
    flat.update({f"{key}_lines": lines.get(key) for key in ("rq", "ra")})
    coverage = full.get("coverage")
    flat["coverage_fraction"] = None if not coverage else coverage.get("fraction")
    period = full.get("periodicity")
    flat["period_m"] = None if not period else period.get("period_m")
    flat["period_angle_deg"] = None if not period else period.get("angle_deg")
    flat["detail"] = full
    return flat


def _spectrum_stats(parsed: ParsedFile) -> tuple[dict[str, Any], bytes | None]:
    bias = parsed.axes.get("bias_v")
    if bias is None or bias.size < 5:
        return {}, None
    current_name = next(
        (n for n, u in parsed.units.items() if u == "A" and n in parsed.channels), None
    )
    stats: dict[str, Any] = {
        "points": int(bias.size),
        "bias_min_v": float(np.nanmin(bias)),
        "bias_max_v": float(np.nanmax(bias)),
    }
    trace = None
    if current_name is not None:
        current = np.asarray(parsed.channels[current_name], dtype=float)
        # 21 points, or the largest odd window a short sweep allows (order 3 needs 5).
        window = min(21, bias.size if bias.size % 2 else bias.size - 1)
        if window >= 5:
            try:
                didv = spectra.numerical_didv(bias, current, window=window, order=3)
            except ValueError as exc:
                stats["didv_error"] = str(exc)
            else:
                trace = didv
                stats["didv_min_a_per_v"] = float(np.nanmin(didv))
                stats["didv_max_a_per_v"] = float(np.nanmax(didv))
                try:
                    onset = spectra.onset_energy(bias, didv)
                except (ValueError, AttributeError):
                    onset = None
                stats["onset_v"] = None if onset is None else float(onset)
        stats["current_min_a"] = float(np.nanmin(current))
        stats["current_max_a"] = float(np.nanmax(current))
    if trace is None:
        trace = np.asarray(next(iter(parsed.channels.values())), dtype=float)
        if trace.ndim != 1:
            return stats, None
    try:
        picture = thumbnails.spectrum_png(bias, trace)
    except ValueError:
        picture = None
    return stats, picture


def analyse(parsed: ParsedFile, given: dict[str, Any]) -> Analysis:
    """Statistics and a thumbnail for what a reader found. The reader has already merged the
    upload's metadata over the header (what the caller sent wins); the references it does not
    normalise (instrument, sample, tip, operator) are taken from the upload as sent."""
    metadata = dict(parsed.metadata)
    for key in _PASSTHROUGH:
        if given.get(key) not in (None, "") and key not in metadata:
            metadata[key] = given[key]
    kind = str(parsed.kind or "other")
    result = Analysis(kind=kind, metadata=metadata)
    image = _first_image(parsed)
    if kind in ("topograph", "current", "other") and image is not None:
        name, z = image
        dx, dy = _spacing(metadata, z.shape)
        threshold = metadata.get("coverage_threshold_m")
        full = images.image_statistics(
            z,
            dx=dx,
            dy=dy,
            coverage_threshold=float(threshold) if isinstance(threshold, int | float) else None,
            periodicity=True,
        )
        result.stats = _flat_image_stats(full)
        result.stats["channel"] = name
        result.thumbnail = thumbnails.thumbnail_png(z, dx=dx, dy=dy)
        metadata.setdefault("channel_name", name)
    elif kind in ("spectrum", "grid"):
        result.stats, result.thumbnail = _spectrum_stats(parsed)
    return result


def acquired_at_of(metadata: dict[str, Any]) -> datetime | None:
    value = metadata.get("acquired_at")
    if isinstance(value, datetime):
        return value
    if isinstance(value, str):
        try:
            parsed = datetime.fromisoformat(value)
        except ValueError:
            return None
        return parsed if parsed.tzinfo is not None else None
    return None
