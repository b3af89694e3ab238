"""Thumbnails: an image array or a spectrum to small PNG bytes, without matplotlib figures.

An image thumbnail is a palette ("P") PNG: the levelled, clipped heights become 8-bit
indices into a 256-colour table taken from a matplotlib colormap's lookup table (matplotlib
is imported for that table only; no Figure is ever made). PERFORMANCE.md §2 measured why:
a palette PNG at compression level 1 costs 1 ms where an RGB PNG at the default level costs
16 ms, and a minimal matplotlib figure 34 ms at 512².

Orientation: row 0 of the array is the top row of the picture. Readers that store the first
scan line at the bottom (y upwards) flip the array before calling, as they do for display.
"""

from __future__ import annotations

import io
import math
from functools import lru_cache

import matplotlib  # only for its colormap tables; never a Figure (see module docstring)
import numpy as np
from PIL import Image, ImageDraw

from labbook.science.errors import (
    ScienceInputError,
    UnknownNameError,
    require_finite,
    require_positive,
)
from labbook.science.images import (
    _BLOCK_ELEMENTS,
    _as_image,
    _buffer,
    _check_not_infinite,
    _fit,
    _row_blocks,
)

#: The default colour table: matplotlib's "inferno". It is perceptually uniform and its
#: lightness rises monotonically from black to pale yellow, so brightness reads as height
#: (as in the hot dark-to-bright tables the trade is used to), it stays readable in
#: greyscale print and for colour-blind readers.
DEFAULT_COLORMAP = "inferno"

#: The default clip: 1st and 99th percentile of the levelled heights (full resolution), so a
#: few spikes or a tip change do not squeeze the rest of the image into two or three colours.
DEFAULT_CLIP = (1.0, 99.0)


# --- colour tables --------------------------------------------------------------------------


@lru_cache(maxsize=32)
def colormap_palette(name: str = DEFAULT_COLORMAP) -> bytes:
    """The 256-colour PNG palette (768 bytes, R G B per entry) of a matplotlib colormap.

    Only the colormap's lookup table is read (matplotlib is imported with this module, not
    on the first thumbnail: that import allocates ~8–10 MiB and ~0.1 s, which belong to a
    process's start, not to the first file it measures).
    """
    try:
        colormap = matplotlib.colormaps[name]
    except (KeyError, TypeError):
        raise UnknownNameError(
            f"colormap {name!r} is unknown; use a matplotlib colormap name such as "
            f"{DEFAULT_COLORMAP!r}, 'viridis', 'cividis' or 'gray'",
            argument="colormap",
        ) from None
    table = colormap.resampled(256)(np.arange(256), bytes=True)
    return np.ascontiguousarray(table[:, :3], dtype=np.uint8).tobytes()


# --- image thumbnails -----------------------------------------------------------------------


def _check_clip(clip: tuple[float, float] | None) -> tuple[float, float] | None:
    if clip is None:
        return None
    try:
        low, high = clip
    except (TypeError, ValueError):
        raise ScienceInputError(
            f"clip must be (low, high) percentiles, got {clip!r}", argument="clip"
        ) from None
    low, high = require_finite(low, "clip"), require_finite(high, "clip")
    if not 0.0 <= low < high <= 100.0:
        raise ScienceInputError(
            f"clip percentiles must satisfy 0 ≤ low < high ≤ 100, got {clip!r}", argument="clip"
        )
    return low, high


def _check_side(value: int, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or not 1 <= value <= 4096:
        raise ScienceInputError(
            f"{name} must be an integer from 1 to 4096 pixels, got {value!r}", argument=name
        )
    return int(value)


def _linear_rank(percent: float, count: int) -> tuple[int, int, float]:
    """(rank below, rank above, weight) of a percentile among ``count`` sorted values, by
    numpy.percentile's default "linear" method (Hyndman & Fan 1996, definition 7), in the
    same floating-point steps as numpy so that the interpolated value is bit-identical."""
    q = percent / 100.0
    virtual = (count - 1) * q
    if virtual >= count - 1:
        return count - 1, count - 1, 0.0
    below = math.floor(virtual)
    return below, below + 1, virtual - below


def _lerp(below: float, above: float, weight: float) -> float:
    # As numpy does: from the nearer end, so that a weight of 1 gives ``above`` exactly.
    difference = above - below
    if weight >= 0.5:
        return above - difference * (1.0 - weight)
    return below + difference * weight


#: Size of the pseudo-random sample that guesses the guards of :func:`_guarded_statistics`:
#: its quantiles land within a few tenths of a percent of the image's, and it partitions
#: in microseconds.
_GUARD_SAMPLE = 8192


@lru_cache(maxsize=8)
def _sample_positions(size: int) -> np.ndarray:
    """Sorted pseudo-random positions of the guard sample in an array of ``size``. Not a
    stride: a regular grid of samples aliases with a lattice (every 32nd pixel of a 512-wide
    image sees two phases of a 12.8-pixel period) and would miss the tails."""
    positions = np.random.default_rng(size).integers(0, size, _GUARD_SAMPLE)
    positions.sort()
    positions.flags.writeable = False
    return positions


def _smallest(values: np.ndarray, first: int, last: int) -> tuple[float, float]:
    """The ``first``-th and ``last``-th smallest (0-based, last is first or first + 1) of
    ``values``, which are reordered in place."""
    values.partition(first)
    value = float(values[first])
    return value, (float(values[first + 1 :].min()) if last > first else value)


def _beyond(values: np.ndarray, guard: np.generic, *, below: bool, limit: int) -> np.ndarray | None:
    """The values ≤ ``guard`` (``below``) or ≥ it, as a new array; None when there are more
    than ``limit``. One block at a time, so the comparison's mask stays block-sized."""
    compare = np.less_equal if below else np.greater_equal
    mask = _buffer("guard", (min(values.size, _BLOCK_ELEMENTS),), np.bool_)
    parts, total = [], 0
    for start in range(0, values.size, _BLOCK_ELEMENTS):
        chunk = values[start : start + _BLOCK_ELEMENTS]
        part = chunk[compare(chunk, guard, out=mask[: chunk.size])]
        total += part.size
        if total > limit:
            return None
        parts.append(part)
    return parts[0] if len(parts) == 1 else np.concatenate(parts)


def _guarded_statistics(
    values: np.ndarray, finite: int, low: tuple[int, int], high: tuple[int, int]
) -> tuple[float, float, float, float] | None:
    """The values of ranks ``low`` and ``high`` (pairs of 0-based ranks) among the
    ``finite`` non-NaN ``values``, without reordering ``values``. None when the guess below
    misses or does not pay; the caller then partitions everything.

    A pseudo-random sample guesses guard values a little beyond the wanted ranks; one comparison
    over the array extracts the values at or beyond each guard (a percent or two of them
    for the default clip) and only those are partitioned. The answer does not depend on the
    guess: when the extract below a guard holds at least the k + 1 smallest ranks, every
    value left out is larger than every value kept, so the k-th smallest of the array is the
    k-th smallest of the extract (likewise above). NaN compares false and is never kept.
    """
    need_low = low[1] + 1  # ranks 0 … low[1]
    need_high = finite - high[0]  # ranks high[0] … finite − 1
    limit = finite // 8
    if finite < 4 * _GUARD_SAMPLE or need_low + need_high > limit:
        return None
    sample = values[_sample_positions(values.size)]
    if finite < values.size:
        sample = sample[~np.isnan(sample)]
    m = sample.size
    # Sample ranks about four binomial standard deviations beyond the expected ones.
    expect_low, expect_high = need_low / finite * m, need_high / finite * m
    rank_low = math.ceil(expect_low + 4.0 * math.sqrt(expect_low) + 4.0)
    rank_high = math.floor(m - 1 - expect_high - 4.0 * math.sqrt(expect_high) - 4.0)
    if m < _GUARD_SAMPLE // 4 or not 0 <= rank_low < rank_high < m:
        return None
    sample.partition((rank_low, rank_high))
    kept_low = _beyond(values, sample[rank_low], below=True, limit=limit)
    if kept_low is None or kept_low.size < need_low:
        return None
    kept_high = _beyond(values, sample[rank_high], below=False, limit=limit)
    if kept_high is None or kept_high.size < need_high:
        return None
    offset = finite - kept_high.size  # the rank in ``values`` of the extract's smallest
    return (
        *_smallest(kept_low, *low),
        *_smallest(kept_high, high[0] - offset, high[1] - offset),
    )


def _partitioned_statistics(
    values: np.ndarray, finite: int, low: tuple[int, int], high: tuple[int, int]
) -> tuple[float, float, float, float]:
    """As :func:`_guarded_statistics`, by partitioning ``values`` in place (NaN sort last).
    Two single-index partitions: numpy's selection is several times faster for one index
    than for several at once, and the second only needs the part below the first index."""
    values.partition(high[0])
    high_below = float(values[high[0]])
    high_above = float(values[high[0] + 1 : finite].min()) if high[1] > high[0] else high_below
    if low[0] >= high[0]:  # both percentiles between the same two ranks
        return high_below, high_above, high_below, high_above
    part = values[: high[0]]
    part.partition(low[0])
    low_below = float(part[low[0]])
    if low[1] == low[0]:
        low_above = low_below
    elif low[1] < high[0]:
        low_above = float(part[low[0] + 1 :].min())
    else:
        low_above = high_below
    return low_below, low_above, high_below, high_above


def _percentile_pair(
    values: np.ndarray, finite: int, low: float, high: float
) -> tuple[float, float, bool]:
    """(low percentile, high percentile, whether ``values`` was reordered)."""
    low_rank, high_rank = _linear_rank(low, finite), _linear_rank(high, finite)
    found = _guarded_statistics(values, finite, low_rank[:2], high_rank[:2])
    reordered = found is None
    if found is None:
        found = _partitioned_statistics(values, finite, low_rank[:2], high_rank[:2])
    return (
        _lerp(found[0], found[1], low_rank[2]),
        _lerp(found[2], found[3], high_rank[2]),
        reordered,
    )


def _percentiles(values: np.ndarray, finite: int, low: float, high: float) -> tuple[float, float]:
    """The ``low`` and ``high`` percentiles of the first ``finite`` values in sorted order:
    ``numpy.percentile`` (default "linear" method) of the non-NaN values taken as float64,
    bit for bit.

    ``values`` is 1-D and may be reordered in place (NaN sort last). Usually only a percent
    or two of it is partitioned (see :func:`_guarded_statistics`), otherwise all of it.
    """
    found = _percentile_pair(values, finite, low, high)
    return found[0], found[1]


def _output_size(shape: tuple[int, int], longest: int, dx: float, dy: float) -> tuple[int, int]:
    """(width, height) in pixels with the physical aspect ratio nx·dx : ny·dy kept."""
    ny, nx = shape
    width, height = nx * dx, ny * dy
    if width >= height:
        return longest, max(1, round(longest * height / width))
    return max(1, round(longest * width / height)), longest


def thumbnail_png(
    z: np.ndarray,
    *,
    longest_side: int = 256,
    colormap: str = DEFAULT_COLORMAP,
    clip: tuple[float, float] | None = DEFAULT_CLIP,
    level: bool = True,
    dx: float = 1.0,
    dy: float = 1.0,
) -> bytes:
    """A colour thumbnail of an image as palette PNG bytes.

    Steps: level by the least-squares plane (closed form, ``level``), find the ``clip``
    percentiles of the finite pixels at full resolution (None: the full range), map them to
    palette indices 0–255 (values beyond clip to the end colours, NaN pixels to index 0),
    resize with Pillow's BOX filter (the mean of the pixels each output pixel covers; images
    smaller than the thumbnail are enlarged with NEAREST, so their pixels stay visible) to
    ``longest_side`` keeping the physical aspect nx·dx : ny·dy, and write a "P" PNG at
    compression level 1 with ``colormap``'s 256 colours. The same input gives the same bytes.

    Memory: besides the input, one full-size array of the working precision (float32, or
    float64 for a float64 input) for the percentiles, then a full-size uint8 array: for a
    4096² float32 image, 64 MiB at the peak, plus Pillow's small output image and the
    values beyond the percentile guards (a percent or two of the pixels, at most 1/4).
    """
    longest = _check_side(longest_side, "longest_side")
    percentiles = _check_clip(clip)
    dx, dy = require_positive(dx, "dx"), require_positive(dy, "dy")
    palette = colormap_palette(colormap)
    image = _as_image(z, min_size=2 if level else 1)
    ny, nx = image.shape
    work_type = np.float64 if image.dtype == np.float64 else np.float32
    if level:
        fit = _fit(image)
        column, row = (term.astype(work_type) for term in fit.terms())
        has_nan = fit.has_nan
    else:
        _check_not_infinite(image, "z")
        column = np.zeros(nx, dtype=work_type)
        row = np.zeros(ny, dtype=work_type)
        has_nan = image.dtype.kind == "f" and bool(np.isnan(image).any())
    blocks = _row_blocks(ny, nx)

    def levelled(rows: slice, out: np.ndarray) -> np.ndarray:
        # The same operations for the percentile copy and the final pass: identical values.
        np.subtract(image[rows], column, out=out)
        out -= row[rows, None]
        return out

    values = np.empty((ny, nx), dtype=work_type)
    for rows in blocks:
        levelled(rows, values[rows])
    flat = values.reshape(-1)
    finite = int(np.count_nonzero(~np.isnan(flat))) if has_nan else flat.size
    if finite == 0:
        raise ScienceInputError("z has no finite pixels", argument="z")
    reordered = False
    if percentiles is None:
        low = float(np.nanmin(flat)) if has_nan else float(flat.min())
        high = float(np.nanmax(flat)) if has_nan else float(flat.max())
    else:
        low, high, reordered = _percentile_pair(flat, finite, *percentiles)
    # The levelled copy is mapped to indices in place when it is intact and one block (up to
    # 2^18 pixels); a larger one is levelled again block by block instead, so that it and
    # the full-size index array are never held together.
    reuse = not reordered and len(blocks) == 1
    if not reuse:
        del values, flat

    scale = 255.0 / (high - low) if high > low else 0.0
    indices = np.empty((ny, nx), dtype=np.uint8)
    for rows in blocks:
        if reuse:
            block = values[rows]
        else:
            shape = (rows.stop - rows.start, nx)
            block = levelled(rows, _buffer("thumbnail", shape, work_type))
        block -= low
        block *= scale
        np.clip(block, 0.0, 255.0, out=block)
        block += 0.5  # round to the nearest index on the cast, which truncates
        if has_nan:
            block[np.isnan(block)] = 0.0
        np.copyto(indices[rows], block, casting="unsafe")

    width, height = _output_size((ny, nx), longest, dx, dy)
    picture = Image.frombuffer("L", (nx, ny), indices, "raw", "L", 0, 1)  # shares the array
    shrinking = width < nx or height < ny
    small = picture.resize(
        (width, height), Image.Resampling.BOX if shrinking else Image.Resampling.NEAREST
    )
    small.putpalette(palette, rawmode="RGB")
    out = io.BytesIO()
    small.save(out, format="PNG", compress_level=1)
    return out.getvalue()


# --- spectrum thumbnails --------------------------------------------------------------------

# Palette of the spectrum plots: background, frame, zero lines, then one colour per trace.
_SPECTRUM_COLOURS = (
    (255, 255, 255),
    (90, 90, 90),
    (205, 205, 205),
    (24, 68, 140),
    (190, 60, 40),
    (40, 130, 70),
    (120, 70, 150),
)
_TRACE_INDEX = 3
_MARGIN = 5


def _spectrum_palette() -> bytes:
    colours = list(_SPECTRUM_COLOURS) + [(0, 0, 0)] * (256 - len(_SPECTRUM_COLOURS))
    return bytes(channel for colour in colours for channel in colour)


def spectrum_png(
    bias_v: np.ndarray,
    y: np.ndarray,
    *,
    width: int = 256,
    height: int = 160,
) -> bytes:
    """A small line plot of one spectrum (or several: ``y`` of shape (traces, n)) as a
    palette PNG, drawn with Pillow's ImageDraw, no text and no matplotlib.

    A grey frame, light grey lines at V = 0 and y = 0 when they fall inside the ranges, and
    the traces (up to four colours, then repeated) scaled to fill the frame with 5 % room
    above and below. NaN points leave gaps. Points are joined in the order given.
    """
    width = _check_side(width, "width")
    height = _check_side(height, "height")
    if width < 4 * _MARGIN or height < 4 * _MARGIN:
        raise ScienceInputError(
            f"the plot must be at least {4 * _MARGIN}×{4 * _MARGIN} pixels", argument="width"
        )
    bias = np.asarray(bias_v, dtype=np.float64)
    traces = np.asarray(y, dtype=np.float64)
    if bias.ndim != 1 or bias.size < 2:
        raise ScienceInputError("bias_v must be 1-D with at least 2 points", argument="bias_v")
    if not np.isfinite(bias).all():
        raise ScienceInputError("bias_v must be finite", argument="bias_v")
    if traces.ndim == 1:
        traces = traces[None, :]
    if traces.ndim != 2 or traces.shape[1] != bias.size:
        raise ScienceInputError(
            f"y must have shape ({bias.size},) or (traces, {bias.size}), got {np.shape(y)}",
            argument="y",
        )
    if np.isinf(traces).any():
        raise ScienceInputError("y contains infinite values", argument="y")
    if np.isnan(traces).all():
        raise ScienceInputError("y has no finite values", argument="y")
    v_low, v_high = float(bias.min()), float(bias.max())
    if v_high == v_low:
        raise ScienceInputError("bias_v spans no range (all values equal)", argument="bias_v")
    y_low, y_high = float(np.nanmin(traces)), float(np.nanmax(traces))
    pad = 0.05 * (y_high - y_low) if y_high > y_low else max(abs(y_high), 1e-300)
    y_low, y_high = y_low - pad, y_high + pad

    x_span = width - 1 - 2 * _MARGIN
    y_span = height - 1 - 2 * _MARGIN

    def column(v: np.ndarray | float) -> np.ndarray | float:
        return _MARGIN + (v - v_low) * (x_span / (v_high - v_low))

    def line(value: np.ndarray | float) -> np.ndarray | float:
        return height - 1 - _MARGIN - (value - y_low) * (y_span / (y_high - y_low))

    picture = Image.new("P", (width, height), 0)
    picture.putpalette(_spectrum_palette(), rawmode="RGB")
    draw = ImageDraw.Draw(picture)
    draw.rectangle((0, 0, width - 1, height - 1), outline=1)
    if v_low < 0.0 < v_high:
        x0 = round(float(column(0.0)))
        draw.line(((x0, 1), (x0, height - 2)), fill=2)
    if y_low < 0.0 < y_high:
        y0 = round(float(line(0.0)))
        draw.line(((1, y0), (width - 2, y0)), fill=2)
    xs = np.asarray(column(bias))
    for number, trace in enumerate(traces):
        colour = _TRACE_INDEX + number % (len(_SPECTRUM_COLOURS) - _TRACE_INDEX)
        ys = np.asarray(line(trace))
        finite = np.isfinite(ys)
        # Split the trace into runs of finite points; each run is one polyline.
        edges = np.flatnonzero(np.diff(np.concatenate(([0], finite.view(np.int8), [0]))))
        for start, stop in zip(edges[::2], edges[1::2], strict=True):
            points = list(zip(xs[start:stop].tolist(), ys[start:stop].tolist(), strict=True))
            if len(points) == 1:
                draw.point(points, fill=colour)
            else:
                draw.line(points, fill=colour, width=1)
    out = io.BytesIO()
    picture.save(out, format="PNG", compress_level=1)
    return out.getvalue()
