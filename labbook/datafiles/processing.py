"""What a worker does with a stored file: read it, compute its statistics and thumbnail with
the science library, resolve its lineage. The numbers come from ``labbook.science``; this
module only decides which function applies to which kind of data."""

from __future__ import annotations

import re
import warnings
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


# Channel names that hold a lock-in dI/dV whose unit does not say so (a lock-in output is often
# stored in volts): the in-phase output or the magnitude, never the quadrature (y) or the phase.
# Matched on the readers' snake-case names ("LockIn X" → "lockin_x", "dI/dV" → "di_dv").
_LOCKIN_NAME = re.compile(r"^(di_?dv|lockin(_?\d+)?(_(x|r|di_?dv))?|lockin_di_?dv(_x)?)$")


def _lockin_channel(parsed: ParsedFile, ndim: int) -> str | None:
    """The measured dI/dV channel: a conductance (unit S, which A/V becomes in the readers),
    else one named like a lock-in output; None when the file has neither."""
    candidates = [n for n, a in parsed.channels.items() if a.ndim == ndim]
    for name in candidates:
        if parsed.units.get(name) == "S":
            return name
    if parsed.metadata.get("lockin_harmonic") not in (None, 1):
        return None  # a second-harmonic output is d²I/dV², not dI/dV
    return next((n for n in candidates if _LOCKIN_NAME.match(n)), None)


def _current_channel(parsed: ParsedFile, ndim: int) -> str | None:
    return next(
        (n for n, a in parsed.channels.items() if a.ndim == ndim and parsed.units.get(n) == "A"),
        None,
    )


def _window(points: int) -> int:
    # 21 points, or the largest odd window a short sweep allows (order 3 needs 5).
    return min(21, points if points % 2 else points - 1)


#: ε of the broadened I/V as a share of the sweep's bias span. A choice, not a rule: Feenstra
#: (Phys. Rev. B 50, 4561 (1994)) broadens over about the band gap of a semiconductor, and a
#: gapped sample wants ε of about its gap (common practice); for a metal, whose I/V has no
#: zero to step over, any ε well below the span changes (dI/dV)/(I/V) little away from 0 V.
#: 10 % of the span is wide enough to carry a sweep of a small-gap surface through V = 0.
NORM_EPSILON_SHARE = 0.10
#: At most this many points of each trace are stored for the dataset page's plot.
TRACE_POINTS = 512


def _trace_indices(points: int, limit: int = TRACE_POINTS) -> np.ndarray:
    """Every stride-th index with both end points kept, at most ``limit`` of them.

    With stride s = ⌈(n − 1)/(limit − 1)⌉ the stride alone gives ⌊(n − 1)/s⌋ + 1 ≤ limit
    indices; the last point is added only when n − 1 is not a multiple of s, and then
    ⌊(n − 1)/s⌋ < (n − 1)/s ≤ limit − 1, so the count stays ≤ limit."""
    if points <= limit:
        return np.arange(points)
    stride = -(-(points - 1) // (limit - 1))
    indices = np.arange(0, points, stride)
    if indices[-1] != points - 1:
        indices = np.append(indices, points - 1)
    return indices


def _finite_list(values: np.ndarray | None, indices: np.ndarray) -> list[float | None] | None:
    """Plain floats for JSON (PostgreSQL's jsonb refuses NaN): NaN and ±inf become None."""
    if values is None:
        return None
    picked = np.asarray(values, dtype=np.float64)[indices]
    finite = np.isfinite(picked).tolist()
    return [float(v) if ok else None for v, ok in zip(picked.tolist(), finite, strict=True)]


def _finite_range(values: np.ndarray) -> tuple[float | None, float | None]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None, None
    return float(finite.min()), float(finite.max())


def _norm_conductance(
    stats: dict[str, Any],
    bias: np.ndarray,
    current: np.ndarray | None,
    didv: np.ndarray | None,
    calibrated: bool,
) -> np.ndarray | None:
    """(dI/dV)/(I/V)‾ of the sweep into ``stats`` (ε, range) or the reason there is none.

    Only a dI/dV in A/V divides by I/V into a number without unit: a lock-in output in volts
    that could not be scaled has no such meaning, so it gets a note instead."""
    if current is None:
        stats["norm_conductance_error"] = "no current channel"
        return None
    if didv is None:
        stats["norm_conductance_error"] = "no dI/dV"
        return None
    if not calibrated:
        stats["norm_conductance_error"] = "dI/dV is not calibrated in A/V"
        return None
    span = float(np.nanmax(bias) - np.nanmin(bias))
    epsilon = NORM_EPSILON_SHARE * span
    stats["norm_conductance_epsilon_v"] = epsilon if np.isfinite(epsilon) else None
    try:
        ratio = spectra.normalised_conductance(bias, current, didv, epsilon=epsilon)
    except ValueError as exc:  # ScienceInputError is one: NaN in a sweep, zero current …
        stats["norm_conductance_error"] = str(exc)
        stats["norm_conductance_min"] = stats["norm_conductance_max"] = None
        return None
    stats["norm_conductance_min"], stats["norm_conductance_max"] = _finite_range(ratio)
    return ratio


def _sweep_stats(
    bias: np.ndarray,
    current: np.ndarray | None,
    lockin: np.ndarray | None,
    lockin_unit: str,
) -> tuple[dict[str, Any], np.ndarray | None]:
    """Statistics of one sweep and the dI/dV trace for its picture (None: no dI/dV).

    dI/dV is the lock-in's where there is one (a numerical derivative amplifies the current
    noise), else the Savitzky–Golay derivative of I(V). A lock-in output not in siemens is
    put on the numerical dI/dV's scale by a least-squares factor through zero when there is
    a current (common practice: calibrating the lock-in against dI/dV of the I(V) measured
    with it); the factor's sign also undoes a lock-in phase set 180° off.

    With a current and a dI/dV in A/V, the normalised conductance (dI/dV)/(I/V)‾ with I/V
    broadened over ε = :data:`NORM_EPSILON_SHARE` of the bias span. ``stats["traces"]`` keeps
    bias, current, dI/dV and the normalised conductance on at most :data:`TRACE_POINTS`
    points for the dataset page's plot (``None`` for what the sweep does not have; an
    uncalibrated lock-in output as ``didv_lockin`` in its own unit).
    """
    stats: dict[str, Any] = {
        "points": int(bias.size),
        "bias_min_v": float(np.nanmin(bias)),
        "bias_max_v": float(np.nanmax(bias)),
    }
    window = _window(bias.size)
    numerical = None
    if current is not None:
        stats["current_min_a"] = float(np.nanmin(current))
        stats["current_max_a"] = float(np.nanmax(current))
        if window >= 5:
            try:
                numerical = spectra.numerical_didv(bias, current, window=window, order=3)
            except ValueError as exc:
                stats["didv_error"] = str(exc)
    didv, calibrated = numerical, numerical is not None
    if lockin is not None:
        didv, calibrated = lockin.astype(float), lockin_unit == "S"
        if not calibrated and numerical is not None:
            norm = float(np.dot(didv, didv))
            if norm > 0.0 and np.isfinite(norm):
                scale = float(np.dot(numerical, didv)) / norm
                if scale != 0.0 and np.isfinite(scale):
                    didv, calibrated = didv * scale, True
                    stats["didv_lockin_scale"] = scale
        stats["didv_source"] = "lock-in"
    elif numerical is not None:
        stats["didv_source"] = "numerical"
    ratio = _norm_conductance(stats, bias, current, didv, calibrated)
    if current is not None or didv is not None:
        indices = _trace_indices(bias.size)
        traces: dict[str, Any] = {
            "bias_v": _finite_list(bias, indices),
            "current_a": _finite_list(current, indices),
            "didv_a_per_v": _finite_list(didv, indices) if calibrated else None,
            "norm_conductance": _finite_list(ratio, indices),
        }
        if didv is not None and not calibrated:
            traces["didv_lockin"] = _finite_list(didv, indices)
            traces["didv_lockin_unit"] = lockin_unit
        stats["traces"] = traces
    if didv is None:
        return stats, None
    if calibrated:
        stats["didv_min_a_per_v"] = float(np.nanmin(didv))
        stats["didv_max_a_per_v"] = float(np.nanmax(didv))
    onset_trace = didv
    if lockin is not None and window >= 5:
        try:  # the same smoothing the numerical derivative has, so noise does not cross early
            onset_trace = spectra.savgol_smooth(didv, window=window, order=3)
        except ValueError:
            onset_trace = didv
    try:
        onset = spectra.onset_energy(bias, onset_trace)
    except ValueError:
        onset = None
    stats["onset_v"] = None if onset is None else float(onset)
    return stats, didv


def _spectrum_stats(parsed: ParsedFile) -> tuple[dict[str, Any], bytes | None]:
    bias = parsed.axes.get("bias_v")
    if bias is None or bias.size < 5:
        return {}, None
    current_name = _current_channel(parsed, 1)
    lockin_name = _lockin_channel(parsed, 1)
    stats, trace = _sweep_stats(
        bias,
        None if current_name is None else np.asarray(parsed.channels[current_name], float),
        None if lockin_name is None else np.asarray(parsed.channels[lockin_name], float),
        parsed.units.get(lockin_name or "", ""),
    )
    if lockin_name is not None:
        stats["didv_channel"] = lockin_name
    if trace is None:
        trace = np.asarray(next(iter(parsed.channels.values())), dtype=float)
        if trace.ndim != 1:
            return stats, None
    try:
        picture = thumbnails.spectrum_png(bias, trace)
    except ValueError:
        picture = None
    return stats, picture


def _bias_mean_weights(bias: np.ndarray, derivative: bool) -> np.ndarray:
    """w with (spectra @ w) = the mean over bias of each spectrum (derivative False) or of its
    Savitzky–Golay dI/dV (True), as one matrix–vector product over the grid."""
    if not derivative:
        return np.full(bias.size, 1.0 / bias.size)
    return spectra.mean_didv_weights(bias, window=_window(bias.size), order=3)


def _grid_stats(parsed: ParsedFile) -> tuple[dict[str, Any], bytes | None]:
    """A grid of spectra (y, x, bias): a map of dI/dV averaged over the bias axis (the
    lock-in's where the file has one, else the numerical derivative of the current), its
    statistics and thumbnail; and the statistics of the grid's mean spectrum."""
    bias = parsed.axes.get("bias_v")
    if bias is None or bias.size < 5:
        return {}, None
    current_name = _current_channel(parsed, 3)
    lockin_name = _lockin_channel(parsed, 3)
    source_name = lockin_name or current_name
    if source_name is None:
        return {"points": int(bias.size), "map_error": "no current or dI/dV channel"}, None
    grid = parsed.channels[source_name]
    unit = parsed.units.get(source_name, "")
    stats: dict[str, Any] = {}
    try:
        weights = _bias_mean_weights(bias, derivative=lockin_name is None)
    except ValueError as exc:
        return {"points": int(bias.size), "map_error": str(exc)}, None
    work = grid.dtype if grid.dtype in (np.float32, np.float64) else np.dtype(np.float64)
    # A spectrum with a NaN (an aborted or incomplete grid) gives a NaN pixel, not a guess.
    conductance_map = np.asarray(grid, dtype=work) @ weights.astype(work)
    finite = conductance_map[np.isfinite(conductance_map)].astype(np.float64)
    stats["map"] = "mean dI/dV over bias"
    stats["map_source"] = "lock-in" if lockin_name is not None else "numerical"
    stats["channel"] = source_name
    stats["unit"] = unit if lockin_name is not None else "S"
    stats["map_pixels"] = [int(grid.shape[1]), int(grid.shape[0])]
    stats["map_nan_pixels"] = int(conductance_map.size - finite.size)
    for key, reduce in (("mean", np.mean), ("std", np.std), ("min", np.min), ("max", np.max)):
        stats[key] = float(reduce(finite)) if finite.size else None
    picture = None
    if finite.size:
        dx, dy = _spacing(parsed.metadata, conductance_map.shape)
        try:
            # No plane levelling: a conductance map has no sample tilt to remove.
            picture = thumbnails.thumbnail_png(conductance_map, level=False, dx=dx, dy=dy)
        except ValueError as exc:
            stats["thumbnail_error"] = str(exc)

    def mean_spectrum(name: str | None) -> np.ndarray | None:
        if name is None:
            return None
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a bias point NaN everywhere
            return np.nanmean(parsed.channels[name], axis=(0, 1), dtype=np.float64)

    current, lockin = mean_spectrum(current_name), mean_spectrum(lockin_name)
    spectrum, _ = _sweep_stats(bias, current, lockin, parsed.units.get(lockin_name or "", ""))
    if lockin_name is not None:
        spectrum["didv_channel"] = lockin_name
    # The mean spectrum's keys are those of a single spectrum and none is a map key.
    stats.update(spectrum)
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
        # The unit of every value above (a Δf image is in Hz, not the metres of a topograph).
        result.stats["unit"] = parsed.units.get(name, "")
        result.thumbnail = thumbnails.thumbnail_png(z, dx=dx, dy=dy)
        metadata.setdefault("channel_name", name)
    elif kind == "spectrum":
        result.stats, result.thumbnail = _spectrum_stats(parsed)
    elif kind == "grid":
        result.stats, result.thumbnail = _grid_stats(parsed)
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
