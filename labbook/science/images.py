"""Images: plane fit, line flattening, roughness, histograms, coverage by threshold, FFT period.

Conventions:

* An image ``z`` is a 2-D array of shape ``(ny, nx)``: row ``i`` is scan line ``i`` (the slow
  axis, y), column ``j`` the fast axis (x). Pixel (i, j) sits at x = j·dx, y = i·dy, so the
  pixel (0, 0) is the origin. ``dx`` and ``dy`` are pixel spacings in metres for real data
  (any length unit works; lengths come back in that unit). ``z`` is in whatever the channel
  holds (m for a topograph, A for a current image, Hz for Δf); results carry that unit.
* NaN marks a missing pixel (an aborted scan leaves its unscanned lines NaN); every function
  ignores NaN pixels. ±inf is an error, as is an image without finite pixels.
* float32 images (what most controllers write) are upcast to float64 as they are levelled,
  one block of rows at a time, and every sum accumulates in float64. Images up to 2^18
  pixels (512²) are levelled once and the levelled block is shared by every statistic;
  larger ones are levelled again for the histogram pass instead of being kept as a float64
  copy (the pass costs less than the copy's memory).

Memory: :func:`image_statistics`, :func:`roughness`, :func:`coverage_fraction` and
:func:`histogram` level and measure the image one block of rows (~2 MiB of float64) at a
time and make no full-size array: on a 4096² float32 image (64 MiB) they add 10 MiB
(measured with tracemalloc), the per-thread block buffers. :func:`level_plane` and
:func:`flatten_lines` return one new float64 array, as asked. :func:`dominant_period`
holds the half spectrum (complex64) and its power (float32): 1.5× a float32 input, ~100 MiB
at 4096², where numpy's own ``rfft2`` would hold ~380 MiB of temporaries.
"""

from __future__ import annotations

import math
import threading
import warnings
from dataclasses import asdict, dataclass
from typing import Any, Literal

import numpy as np

from labbook.science.errors import (
    ScienceInputError,
    UnknownNameError,
    require_finite,
    require_positive,
)

LineMethod = Literal["median", "mean", "linear"]
LINE_METHODS: tuple[str, ...] = ("median", "mean", "linear")

#: Elements of one block of rows (2 MiB of float64): large enough that numpy's per-call
#: overhead vanishes, small enough to stay in cache and keep the memory bounded.
_BLOCK_ELEMENTS = 1 << 18

#: Largest |z| accepted: the raw variance (slope² × the spread of the pixel coordinates) is
#: computed from squares of z-sized numbers, which must stay finite in float64. No height,
#: current or frequency shift comes anywhere near it.
_MAX_ABS = 1e150

#: Residuals are rescaled by a power of two (exact) when the data lie outside this range, so
#: that squares and fourth powers neither underflow nor overflow.
_SAFE_LOW, _SAFE_HIGH = 2.0**-120, 2.0**120

#: Below this Sq relative to max|z|, the levelled surface is flat to rounding and its
#: skewness and kurtosis are undefined (reported as None, not as noise or NaN).
_FLAT_RELATIVE = 1e-12


# --- input checks ---------------------------------------------------------------------------


def _as_image(z: object, name: str = "z", *, min_size: int = 2) -> np.ndarray:
    """``z`` as a C-contiguous 2-D real array (no copy when it already is one)."""
    array = np.asarray(z)
    if array.dtype.kind not in "iuf":
        raise ScienceInputError(
            f"{name} must hold real numbers, got dtype {array.dtype}", argument=name
        )
    if array.ndim != 2:
        raise ScienceInputError(
            f"{name} must be a 2-D image (ny, nx), got {array.ndim} dimension(s)", argument=name
        )
    if min(array.shape) < min_size:
        raise ScienceInputError(
            f"{name} must be at least {min_size}×{min_size} pixels, got "
            f"{array.shape[0]}×{array.shape[1]}",
            argument=name,
        )
    if array.dtype == np.float16:
        # float16 has no fast paths in numpy and overflows when squared; upcast it here.
        array = array.astype(np.float32)
    return np.ascontiguousarray(array)


def _check_not_infinite(z: np.ndarray, name: str) -> None:
    if z.dtype.kind == "f" and np.isinf(z).any():
        raise ScienceInputError(f"{name} contains infinite values", argument=name)


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Σ a·b without BLAS. OpenBLAS hands long dot products to its thread pool, and waking
    that pool costs 5–9 ms on these 2-core machines (measured) against 0.1 ms for this."""
    return float(np.einsum("i,i->", a, b))


def _row_dot(matrix: np.ndarray, vector: np.ndarray) -> np.ndarray:
    """matrix @ vector without BLAS (see :func:`_dot`)."""
    return np.einsum("ij,j->i", matrix, vector)


def _row_blocks(ny: int, nx: int) -> list[slice]:
    rows = max(1, _BLOCK_ELEMENTS // nx)
    return [slice(start, min(start + rows, ny)) for start in range(0, ny, rows)]


# Block buffers are kept per thread and reused. A fresh 2 MiB numpy buffer is a fresh mmap
# whose pages fault in on first touch; with three or four of them alive at once glibc
# returns them to the system on every call, and those page faults cost more (~0.6 ms per
# buffer at 512², measured) than all the arithmetic done in them. About 10 MiB per thread.
_pool = threading.local()


def _buffer(slot: str, shape: tuple[int, ...], dtype: type = np.float64) -> np.ndarray:
    """A reusable scratch array of ``shape`` (contents undefined). A buffer is never
    returned to a caller: it is overwritten by the next call in the same thread."""
    buffers: dict[tuple[str, type], np.ndarray] | None = getattr(_pool, "buffers", None)
    if buffers is None:
        buffers = _pool.buffers = {}
    count = math.prod(shape)
    buffer = buffers.get((slot, dtype))
    if buffer is None or buffer.size < count:
        buffer = np.empty(max(count, _BLOCK_ELEMENTS), dtype=dtype)
        buffers[(slot, dtype)] = buffer
    return buffer[:count].reshape(shape)


def _block_shape(blocks: list[slice], nx: int) -> tuple[int, int]:
    return (blocks[0].stop - blocks[0].start, nx)


# --- plane fit ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Plane:
    """The least-squares plane z = a·x + b·y + c.

    ``a`` and ``b`` are the slopes along x (columns) and y (rows) in z-units per unit of
    ``dx``/``dy`` (dimensionless m/m for a topograph in metres); ``c`` is the plane's value at
    pixel (0, 0).
    """

    a: float
    b: float
    c: float

    def at(self, x: float | np.ndarray, y: float | np.ndarray) -> float | np.ndarray:
        """The plane's value at (x, y), in the units of the fit."""
        return self.a * x + self.b * y + self.c


@dataclass(frozen=True)
class _Fit:
    """A plane in centred pixel coordinates u = j − (nx−1)/2, v = i − (ny−1)/2.

    z ≈ alpha·u + beta·v + gamma. The moments of (u, v) over the finite pixels let the raw
    variance be recovered from the residuals without another pass (see ``_roughness``).
    """

    shape: tuple[int, int]
    alpha: float
    beta: float
    gamma: float
    count: int
    has_nan: bool
    mean_u: float
    mean_v: float
    var_u: float
    var_v: float
    cov_uv: float

    def terms(self) -> tuple[np.ndarray, np.ndarray]:
        """(column term, row term): plane(i, j) = column[j] + row[i], as float64 vectors."""
        ny, nx = self.shape
        u = np.arange(nx, dtype=np.float64) - (nx - 1) / 2.0
        v = np.arange(ny, dtype=np.float64) - (ny - 1) / 2.0
        return self.alpha * u, self.beta * v + self.gamma

    def plane(self, dx: float, dy: float) -> Plane:
        ny, nx = self.shape
        a = self.alpha / dx
        b = self.beta / dy
        c = self.gamma - self.alpha * (nx - 1) / 2.0 - self.beta * (ny - 1) / 2.0
        return Plane(a=float(a), b=float(b), c=float(c))


def _fit(z: np.ndarray, name: str = "z") -> _Fit:
    """Least-squares plane of a validated image, in closed form on the regular grid.

    On a full grid the centred coordinates are orthogonal, so the normal equations are
    diagonal: alpha = Σ u·colsum / (ny·Σu²), beta = Σ v·rowsum / (nx·Σv²), gamma = mean. That
    needs only the column and row sums (two reductions, no N×3 design matrix: 0.3 ms instead
    of 12 ms for lstsq at 512², PERFORMANCE.md §3). With NaN pixels the same sums, weighted by
    the mask, give the 3×3 normal equations, which are solved directly.
    """
    ny, nx = z.shape
    u = np.arange(nx, dtype=np.float64) - (nx - 1) / 2.0
    v = np.arange(ny, dtype=np.float64) - (ny - 1) / 2.0
    column_sums = z.sum(axis=0, dtype=np.float64)
    row_sums = z.sum(axis=1, dtype=np.float64)
    if np.isfinite(column_sums).all() and np.isfinite(row_sums).all():
        suu = _dot(u, u)
        svv = _dot(v, v)
        n = ny * nx
        return _Fit(
            shape=(ny, nx),
            alpha=_dot(u, column_sums) / (ny * suu),
            beta=_dot(v, row_sums) / (nx * svv),
            gamma=float(column_sums.sum()) / n,
            count=n,
            has_nan=False,
            mean_u=0.0,
            mean_v=0.0,
            var_u=suu / nx,
            var_v=svv / ny,
            cov_uv=0.0,
        )
    _check_not_infinite(z, name)
    if not np.isnan(z).any():
        raise ScienceInputError(
            f"{name} is too large to sum in float64 (|{name}| must stay below {_MAX_ABS:g})",
            argument=name,
        )
    return _masked_fit(z, u, v, name)


def _masked_fit(z: np.ndarray, u: np.ndarray, v: np.ndarray, name: str) -> _Fit:
    """The plane through the finite pixels: per-row and per-column sums of the mask."""
    ny, nx = z.shape
    column_count = np.zeros(nx)
    column_sums = np.zeros(nx)
    row_count = np.empty(ny)
    row_sums = np.empty(ny)
    row_u = np.empty(ny)  # Σ_j u_j over the finite pixels of each row
    for rows in _row_blocks(ny, nx):
        block = z[rows]
        finite = np.isfinite(block)
        filled = np.where(finite, block, 0.0).astype(np.float64, copy=False)
        column_count += finite.sum(axis=0)
        column_sums += filled.sum(axis=0)
        row_count[rows] = finite.sum(axis=1)
        row_sums[rows] = filled.sum(axis=1)
        row_u[rows] = _row_dot(finite, u)
    n = float(row_count.sum())
    if n < 3:
        raise ScienceInputError(
            f"{name} has {int(n)} finite pixel(s); a plane needs at least 3", argument=name
        )
    su, sv = _dot(u, column_count), _dot(v, row_count)
    suu, svv = _dot(u * u, column_count), _dot(v * v, row_count)
    suv = _dot(v, row_u)
    mean_u, mean_v = su / n, sv / n
    var_u, var_v = suu / n - mean_u**2, svv / n - mean_v**2
    cov_uv = suv / n - mean_u * mean_v
    mean_z = float(column_sums.sum()) / n
    # Solve for the slopes in coordinates centred on the finite pixels (well conditioned).
    cuz = _dot(u, column_sums) / n - mean_u * mean_z
    cvz = _dot(v, row_sums) / n - mean_v * mean_z
    determinant = var_u * var_v - cov_uv**2
    if determinant <= 1e-12 * max(var_u * var_v, 1e-300):
        raise ScienceInputError(
            f"the finite pixels of {name} lie on a line; no plane can be fitted", argument=name
        )
    alpha = (cuz * var_v - cvz * cov_uv) / determinant
    beta = (cvz * var_u - cuz * cov_uv) / determinant
    return _Fit(
        shape=(ny, nx),
        alpha=alpha,
        beta=beta,
        gamma=mean_z - alpha * mean_u - beta * mean_v,
        count=int(n),
        has_nan=True,
        mean_u=mean_u,
        mean_v=mean_v,
        var_u=var_u,
        var_v=var_v,
        cov_uv=cov_uv,
    )


def _spacing(dx: float, dy: float) -> tuple[float, float]:
    return require_positive(dx, "dx"), require_positive(dy, "dy")


def plane_fit(z: np.ndarray, *, dx: float = 1.0, dy: float = 1.0) -> Plane:
    """The least-squares plane z = a·x + b·y + c of an image (NaN pixels ignored).

    Closed form on the regular grid (see ``_fit``); equal to ``numpy.linalg.lstsq`` on the
    N×3 design matrix [x, y, 1] to rounding. ``dx``, ``dy``: pixel spacings (m), which set the
    units of the slopes ``a``, ``b``; the levelled image does not depend on them.
    """
    dx, dy = _spacing(dx, dy)
    return _fit(_as_image(z)).plane(dx, dy)


def _levelled_block(
    z: np.ndarray,
    rows: slice,
    column_term: np.ndarray,
    row_term: np.ndarray,
    out: np.ndarray,
    scale: float = 1.0,
) -> np.ndarray:
    """(z[rows] − plane)·scale as float64, written into ``out``: the float32 → float64 upcast
    happens here, once per pixel, inside the subtraction."""
    block = out[: rows.stop - rows.start]
    np.subtract(z[rows], column_term, out=block)
    block -= row_term[rows, None]
    if scale != 1.0:
        block *= scale
    return block


def level_plane(z: np.ndarray) -> np.ndarray:
    """``z`` minus its least-squares plane, as a new float64 array (NaN pixels stay NaN)."""
    image = _as_image(z)
    column_term, row_term = _fit(image).terms()
    levelled = np.subtract(image, column_term, dtype=np.float64)
    levelled -= row_term[:, None]
    return levelled


# --- line flattening ------------------------------------------------------------------------


def _check_line_method(method: str) -> None:
    if method not in LINE_METHODS:
        raise UnknownNameError(
            f"method must be one of {', '.join(LINE_METHODS)}, got {method!r}", argument="method"
        )


#: Longest row whose median is found by the float32 sort (:func:`_row_medians`): it takes
#: 0.8 against 2.8 ms for 512 rows of 512 and 2.3 against 3.1 ms for 256 of 1024, but
#: 4.1 against 3.8 ms for 64 rows of 4096 (measured, numpy 2.4 on AVX-512).
_SORTED_ROW_MAX = 1024


def _row_medians(block: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """Median of each row of a finite block, exactly (the float64 order statistics).

    The rows are ranked in float32 first: numpy sorts short float32 rows with SIMD several
    times faster than it selects in float64 rows (0.4 against 2.2 ms at 512², measured).
    Rounding to float32 never reverses the order of two values, so the wanted rank's
    float32 value is the rounding of the float64 one, and a pixel of that row that rounds to
    it holds the float64 answer unless several do (values within float32 rounding of each
    other); those rows are resolved among their few tied pixels. Blocks with many such rows
    (quantised or constant data) use :func:`_partitioned_row_medians`, as do rows longer
    than :data:`_SORTED_ROW_MAX`, where the float32 sort no longer wins."""
    k, nx = block.shape
    if nx > _SORTED_ROW_MAX:
        return _partitioned_row_medians(block, scratch)
    half = nx // 2
    proxy = _buffer("proxy", (k, nx), np.float32)
    with np.errstate(over="ignore"):  # overflow to ±inf keeps the order too
        np.copyto(proxy, block, casting="same_kind")
    ranked = _buffer("ranked", (k, nx), np.float32)
    np.copyto(ranked, proxy)
    ranked.sort(axis=1)
    upper = _row_rank(block, proxy, ranked, half)
    if upper is None:
        return _partitioned_row_medians(block, scratch)
    if nx % 2:
        return upper
    lower = _row_rank(block, proxy, ranked, half - 1)
    if lower is None:
        return _partitioned_row_medians(block, scratch)
    return 0.5 * (upper + lower)


def _row_rank(
    block: np.ndarray, proxy: np.ndarray, ranked: np.ndarray, rank: int
) -> np.ndarray | None:
    """The ``rank``-th smallest float64 value of each row of ``block``, given its float32
    rounding ``proxy`` and that sorted along rows (``ranked``); None when too many rows tie
    in float32 for a row-by-row resolution to pay."""
    k, nx = block.shape
    target = ranked[:, rank]
    tied = np.zeros(k, dtype=bool)
    if rank > 0:
        tied |= ranked[:, rank - 1] == target
    if rank + 1 < nx:
        tied |= ranked[:, rank + 1] == target
    ties = np.flatnonzero(tied)
    if ties.size > k // 16 + 1:
        return None
    holder = np.argmax(proxy == target[:, None], axis=1)
    result = block[np.arange(k), holder]
    for i in ties:
        # The tied pixels are ranks first … of the row; pick the right one among them.
        first = int(np.searchsorted(ranked[i], target[i], side="left"))
        candidates = block[i][proxy[i] == target[i]]
        candidates.partition(rank - first)
        result[i] = candidates[rank - first]
    return result


def _partitioned_row_medians(block: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """Median of each row of a finite block: one in-place partition of a scratch copy at a
    single index, the lower middle of an even row then being the maximum of the left part."""
    k, nx = block.shape
    work = scratch[:k]
    np.copyto(work, block)
    half = nx // 2
    work.partition(half, axis=1)
    upper = work[:, half].copy()
    if nx % 2:
        return upper
    return 0.5 * (upper + work[:, :half].max(axis=1))


def _line_fit(
    block: np.ndarray, method: str, u: np.ndarray, scratch: np.ndarray, *, may_have_nan: bool = True
) -> tuple[np.ndarray, np.ndarray | None]:
    """(offset, slope or None) of each row of a block: z_ij ≈ offset_i + slope_i·u_j.
    ``may_have_nan=False`` (the caller knows the image has none) skips looking for NaN."""
    finite = None if not (may_have_nan and np.isnan(block).any()) else np.isfinite(block)
    if finite is None:
        if method == "median":
            return _row_medians(block, scratch), None
        offsets = block.mean(axis=1)
        if method == "mean":
            return offsets, None
        # Per-row least-squares line; u is centred, so slope = Σ u·z / Σ u².
        return offsets, _row_dot(block, u) / _dot(u, u)
    with warnings.catch_warnings():
        # Rows that are entirely NaN give NaN offsets and stay NaN: expected, not a warning.
        warnings.simplefilter("ignore", RuntimeWarning)
        if method == "median":
            return np.nanmedian(block, axis=1), None
        offsets = np.nanmean(block, axis=1)
        if method == "mean":
            return offsets, None
        filled = np.where(finite, block, 0.0)
        n = finite.sum(axis=1).astype(np.float64)
        su = _row_dot(finite, u)
        suu = _row_dot(finite, u * u)
        suz = _row_dot(filled, u)
        sz = filled.sum(axis=1)
        denominator = n * suu - su * su
        slope = np.where(
            denominator > 0, (n * suz - su * sz) / np.where(denominator > 0, denominator, 1.0), 0.0
        )
        # With the slope, the offset at u = 0 is mean(z) − slope·mean(u) over the row's pixels.
        offsets = offsets - slope * np.where(n > 0, su / np.maximum(n, 1.0), 0.0)
        return offsets, slope


def _subtract_lines(
    block: np.ndarray, offsets: np.ndarray, slope: np.ndarray | None, u: np.ndarray, out: np.ndarray
) -> np.ndarray:
    result = out[: block.shape[0]]
    np.subtract(block, offsets[:, None], out=result)
    if slope is not None:
        result -= slope[:, None] * u
    return result


def flatten_lines(z: np.ndarray, method: LineMethod = "median") -> np.ndarray:
    """Per-scan-line flattening: subtract from each row its median, its mean, or its
    least-squares line ("linear"), as a new float64 array.

    This removes the line-to-line offsets that tip changes and feedback drift leave between
    scan lines; "median" is the robust choice on images with islands or adsorbates (they pull
    a mean). Only "linear" also removes a slope along the lines: level the plane first
    (:func:`level_plane`) when the image is tilted. NaN pixels are ignored and stay NaN.
    """
    _check_line_method(method)
    image = _as_image(z, min_size=1)
    _check_not_infinite(image, "z")
    ny, nx = image.shape
    u = np.arange(nx, dtype=np.float64) - (nx - 1) / 2.0
    result = np.empty((ny, nx), dtype=np.float64)
    blocks = _row_blocks(ny, nx)
    scratch = _buffer("scratch", _block_shape(blocks, nx))
    for rows in blocks:
        block = image[rows].astype(np.float64, copy=False)
        offsets, slope = _line_fit(block, method, u, scratch)
        _subtract_lines(block, offsets, slope, u, result[rows])
    return result


# --- roughness ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Roughness:
    """Height statistics of an image.

    ``mean``, ``std``, ``min``, ``max``: the image as acquired (finite pixels, z units).
    The rest describe the levelled surface (``levelling`` says how: "plane", or "plane+" a
    line method) and are the areal field parameters of ISO 25178-2 (2012 edition; the
    definitions are quoted from memory, not checked against the text) over the whole image
    as the evaluation area, with the least-squares mean plane as the reference surface:

    * ``rq`` = Sq = sqrt(mean(z²)), root-mean-square height;
    * ``ra`` = Sa = mean(|z|), arithmetic mean height;
    * ``rsk`` = Ssk = mean(z³)/Sq³, skewness; ``rku`` = Sku = mean(z⁴)/Sq⁴, kurtosis (3 for
      a Gaussian surface). Both are None when the surface is flat to rounding (Sq ≤ 1e-12 of
      max|z|), where they are undefined;
    * ``rz`` = Sz = Sp + Sv, maximum height: highest peak minus deepest pit.

    The R names are the profile names (ISO 4287) that the trade uses for either; no
    S-filter or L-filter is applied beyond the levelling, so these are primary-surface values.
    """

    mean: float
    std: float
    min: float
    max: float
    rq: float
    ra: float
    rsk: float | None
    rku: float | None
    rz: float
    pixels: int
    levelling: str

    @property
    def sq(self) -> float:
        """ISO 25178-2 name of :attr:`rq`."""
        return self.rq

    @property
    def sa(self) -> float:
        """ISO 25178-2 name of :attr:`ra`."""
        return self.ra


class _Moments:
    """Running sums of |r|, r², r³, r⁴ and the range of a set of residuals, block by block."""

    def __init__(self) -> None:
        self.n = 0
        self.s1 = 0.0
        self.s2 = 0.0
        self.s3 = 0.0
        self.s4 = 0.0
        self.low = math.inf
        self.high = -math.inf

    def add(self, values: np.ndarray, scratch: np.ndarray) -> None:
        """Add a block (any shape, finite float64); ``scratch``: a buffer at least as large."""
        flat = values.reshape(-1)
        if flat.size == 0:
            return
        work = scratch.reshape(-1)[: flat.size]
        np.abs(flat, out=work)
        self.s1 += float(work.sum())
        np.multiply(flat, flat, out=work)
        # r² is reused: Σr² is its sum, Σr³ = r²·r and Σr⁴ = r²·r² are dot products (no
        # further temporaries).
        self.s2 += float(work.sum())
        self.s3 += _dot(work, flat)
        self.s4 += _dot(work, work)
        self.n += flat.size
        self.low = min(self.low, float(flat.min()))
        self.high = max(self.high, float(flat.max()))


@dataclass(frozen=True)
class _Levelled:
    """Everything one pass over the levelled image gives. The moments are those of the
    residuals multiplied by ``scale``; the raw range is in z units."""

    fit: _Fit
    scale: float  # residuals were multiplied by this exact power of two
    raw_min: float
    raw_max: float
    plane: _Moments
    lines: _Moments | None
    line_method: str | None
    kept: np.ndarray | None  # the levelled (scaled) image when it fitted in one block


def _residual_scale(max_abs: float) -> float:
    if max_abs == 0.0 or _SAFE_LOW <= max_abs <= _SAFE_HIGH:
        return 1.0
    # 2^1000 at most: subnormal data (below 2^-1022) would otherwise overflow the factor.
    return math.ldexp(1.0, min(-math.frexp(max_abs)[1], 1000))


def _raw_range(z: np.ndarray, has_nan: bool) -> tuple[float, float]:
    if has_nan:
        return float(np.nanmin(z)), float(np.nanmax(z))
    return float(z.min()), float(z.max())


def _level_and_measure(z: np.ndarray, line_method: str | None, name: str = "z") -> _Levelled:
    """Plane-level ``z`` block by block, accumulating the moments of the levelled surface and
    (if ``line_method``) of the surface line-flattened after levelling."""
    fit = _fit(z, name)
    raw_min, raw_max = _raw_range(z, fit.has_nan)
    max_abs = max(abs(raw_min), abs(raw_max))
    if max_abs > _MAX_ABS:
        raise ScienceInputError(
            f"|{name}| reaches {max_abs:g}; values beyond {_MAX_ABS:g} cannot be squared "
            "safely in float64 (rescale the data)",
            argument=name,
        )
    scale = _residual_scale(max_abs)
    ny, nx = z.shape
    column_term, row_term = fit.terms()
    u = np.arange(nx, dtype=np.float64) - (nx - 1) / 2.0
    blocks = _row_blocks(ny, nx)
    block_shape = (blocks[0].stop - blocks[0].start, nx)
    levelled = _buffer("levelled", block_shape)
    scratch = _buffer("scratch", block_shape)
    lines_scratch = _buffer("lines", block_shape) if line_method else scratch
    plane = _Moments()
    lines = _Moments() if line_method else None
    for rows in blocks:
        r = _levelled_block(z, rows, column_term, row_term, levelled, scale)
        finite = np.isfinite(r) if fit.has_nan else None
        plane.add(r if finite is None else r[finite], scratch)
        if lines is not None and line_method is not None:
            offsets, slope = _line_fit(r, line_method, u, scratch, may_have_nan=fit.has_nan)
            flattened = _subtract_lines(r, offsets, slope, u, lines_scratch)
            lines.add(flattened if finite is None else flattened[np.isfinite(flattened)], scratch)
    return _Levelled(
        fit=fit,
        scale=scale,
        raw_min=raw_min,
        raw_max=raw_max,
        plane=plane,
        lines=lines,
        line_method=line_method,
        kept=levelled if len(blocks) == 1 else None,
    )


def _roughness(levelled: _Levelled, moments: _Moments, levelling: str) -> Roughness:
    fit, scale = levelled.fit, levelled.scale
    n = moments.n
    rq_scaled = math.sqrt(moments.s2 / n)
    max_abs = max(abs(levelled.raw_min), abs(levelled.raw_max))
    flat = rq_scaled <= _FLAT_RELATIVE * max_abs * scale
    # Raw variance without another pass: z − mean = r + alpha·(u − ū) + beta·(v − v̄), and the
    # least-squares residual r is orthogonal to 1, u and v, so the cross terms vanish.
    sq_plane = math.sqrt(levelled.plane.s2 / levelled.plane.n) / scale
    variance = sq_plane**2 + (
        fit.alpha**2 * fit.var_u + 2.0 * fit.alpha * fit.beta * fit.cov_uv + fit.beta**2 * fit.var_v
    )
    return Roughness(
        mean=fit.gamma + fit.alpha * fit.mean_u + fit.beta * fit.mean_v,
        std=math.sqrt(max(variance, 0.0)),
        min=levelled.raw_min,
        max=levelled.raw_max,
        rq=rq_scaled / scale,
        ra=moments.s1 / n / scale,
        rsk=None if flat else moments.s3 / n / rq_scaled**3,
        rku=None if flat else moments.s4 / n / rq_scaled**4,
        rz=(moments.high - moments.low) / scale,
        pixels=n,
        levelling=levelling,
    )


def _levelling_name(line_method: str | None) -> str:
    return "plane" if line_method is None else f"plane+lines:{line_method}"


def roughness(z: np.ndarray, *, line_method: LineMethod | None = None) -> Roughness:
    """Height statistics and ISO 25178-2 areal roughness (Sq, Sa, Ssk, Sku, Sz) of an image.

    The surface is levelled by its least-squares plane; with ``line_method`` ("median",
    "mean" or "linear") each scan line is then flattened as by :func:`flatten_lines`, which
    takes out line-to-line offsets (and lowers the roughness by whatever they contributed).
    See :class:`Roughness` for the definitions. NaN pixels are ignored.
    """
    if line_method is not None:
        _check_line_method(line_method)
    levelled = _level_and_measure(_as_image(z), line_method)
    moments = levelled.plane if levelled.lines is None else levelled.lines
    return _roughness(levelled, moments, _levelling_name(line_method))


# --- histogram and coverage ----------------------------------------------------------------


@dataclass(frozen=True)
class Histogram:
    """Counts of the finite pixels in ``len(counts)`` equal bins; ``edges`` has one more
    entry (z units). A value on an inner edge counts in the bin above it and the last bin
    includes its upper edge, as in ``numpy.histogram``."""

    counts: np.ndarray
    edges: np.ndarray


def _histogram_range(low: float, high: float) -> tuple[float, float]:
    # A constant image gets the unit-wide range numpy.histogram gives it; so does a range
    # too narrow to divide into bins in float64 (a spread of a few subnormals).
    if low == high or not math.isfinite(1024.0 / (high - low)):
        # (±0.5 would vanish next to values beyond 1e15; widen relative to them there.)
        pad = max(0.5, 1e-12 * max(abs(low), abs(high)))
        return low - pad, high + pad
    return low, high


def _add_counts(
    values: np.ndarray,
    low: float,
    high: float,
    counts: np.ndarray,
    scratch: np.ndarray,
    edges: np.ndarray | None = None,
) -> None:
    """Bin finite values into ``counts`` (in place): index = ⌊(value − low)·bins/(high − low)⌋.

    A bincount of computed indices is 2.5× faster than ``numpy.histogram`` at 512². The
    computed index can be one bin off for a value within rounding of an inner edge; with
    ``edges`` those values are moved to the bin the edges say (edges[k] ≤ value < edges[k+1],
    as numpy does), which matters for quantised raw data, where values sit on edges exactly.
    """
    bins = counts.size
    flat = values.reshape(-1)
    work = scratch.reshape(-1)[: flat.size]
    np.subtract(flat, low, out=work)
    work *= bins / (high - low)
    index = _buffer("index", (flat.size,), np.intp)
    # The maximum itself goes in the last bin. Clamped before the cast, which is cheaper in
    # float than in intp and the same: ⌊min(w, bins − 1)⌋ = min(⌊w⌋, bins − 1) for w ≥ 0.
    np.minimum(work, bins - 1, out=work)
    np.copyto(index, work, casting="unsafe")  # truncation = floor, the values being ≥ 0
    if edges is not None:
        index -= flat < edges[index]
        index += (flat >= edges[index + 1]) & (index < bins - 1)
    counts += np.bincount(index, minlength=bins)


def _check_bins(bins: int) -> int:
    if isinstance(bins, bool) or not isinstance(bins, int | np.integer) or bins < 1:
        raise ScienceInputError(f"bins must be a positive integer, got {bins!r}", argument="bins")
    return int(bins)


def histogram(z: np.ndarray, bins: int = 256) -> Histogram:
    """Histogram of the finite pixels of ``z`` as given (not levelled) over their full range."""
    bins = _check_bins(bins)
    image = _as_image(z, min_size=1)
    _check_not_infinite(image, "z")
    has_nan = image.dtype.kind == "f" and bool(np.isnan(image).any())
    if has_nan and np.isnan(image).all():
        raise ScienceInputError("z has no finite pixels", argument="z")
    low, high = _histogram_range(*_raw_range(image, has_nan))
    counts = np.zeros(bins, dtype=np.int64)
    edges = np.linspace(low, high, bins + 1)
    ny, nx = image.shape
    blocks = _row_blocks(ny, nx)
    scratch = _buffer("scratch", _block_shape(blocks, nx))
    for rows in blocks:
        block = image[rows]
        values = block[np.isfinite(block)] if has_nan else block
        _add_counts(values, low, high, counts, scratch, edges)
    return Histogram(counts=counts, edges=edges)


Reference = Literal["min", "absolute"]


def _coverage_level(reference: str, threshold: float, low: float) -> float:
    if reference == "min":
        return low + threshold
    if reference == "absolute":
        return threshold
    raise UnknownNameError(
        f"relative_to must be 'min' or 'absolute', got {reference!r}", argument="relative_to"
    )


def coverage_fraction(
    z: np.ndarray,
    threshold: float,
    *,
    relative_to: Reference = "min",
    level: bool = True,
) -> float:
    """Fraction (0–1) of the image area higher than a threshold: island coverage by height.

    ``threshold`` (z units) is measured from the lowest pixel (``relative_to="min"``: "more
    than 1 Å above the substrate") or is an absolute height (``"absolute"``). With ``level``
    (default) the image is first levelled by its least-squares plane, so "absolute" is then
    a height above the mean plane. The plane of an image with islands sits between substrate
    and islands but stays parallel to the substrate when the islands are spread over the
    image, so the substrate remains flat and one threshold separates it from the islands.
    Pixels exactly at the threshold count as below; NaN pixels are left out of the area.
    """
    threshold = require_finite(threshold, "threshold")
    image = _as_image(z, min_size=2 if level else 1)
    if not level:
        _check_not_infinite(image, "z")
        finite = (
            int(np.count_nonzero(np.isfinite(image))) if image.dtype.kind == "f" else image.size
        )
        if finite == 0:
            raise ScienceInputError("z has no finite pixels", argument="z")
        has_nan = finite < image.size
        low, _ = _raw_range(image, has_nan)
        cut = _coverage_level(relative_to, threshold, low)
        return int(np.count_nonzero(image > cut)) / finite
    levelled = _level_and_measure(image, None)
    counts = _second_pass(image, levelled, bins=None, coverage=(threshold, relative_to))
    return counts.above / levelled.plane.n


@dataclass
class _SecondPass:
    counts: np.ndarray | None
    low: float
    high: float
    above: int


def _second_pass(
    z: np.ndarray,
    levelled: _Levelled,
    *,
    bins: int | None,
    coverage: tuple[float, str] | None,
) -> _SecondPass:
    """Histogram and/or coverage count of the plane-levelled surface (needs its range, known
    only after the first pass). Reuses the levelled image when it fitted in one block."""
    scale = levelled.scale
    low, high = _histogram_range(levelled.plane.low, levelled.plane.high)
    cut: float | None = None
    if coverage is not None:
        threshold, reference = coverage
        cut = _coverage_level(reference, threshold * scale, levelled.plane.low)
    counts = None if bins is None else np.zeros(bins, dtype=np.int64)
    ny, nx = z.shape
    blocks = _row_blocks(ny, nx)
    column_term, row_term = levelled.fit.terms()
    block_shape = (blocks[0].stop - blocks[0].start, nx)
    buffer = _buffer("levelled", block_shape)  # the kept block itself when there is one
    scratch = _buffer("scratch", block_shape)
    above = 0
    for rows in blocks:
        if levelled.kept is not None:
            r = levelled.kept
        else:
            r = _levelled_block(z, rows, column_term, row_term, buffer, scale)
        values = r[np.isfinite(r)] if levelled.fit.has_nan else r
        if counts is not None:
            _add_counts(values, low, high, counts, scratch)
        if cut is not None:
            above += int(np.count_nonzero(values > cut))
    return _SecondPass(
        counts=counts,
        low=low / scale,
        high=high / scale,
        above=above,
    )


# --- periodicity ----------------------------------------------------------------------------

Symmetry = Literal["hexagonal", "square", "none"]


@dataclass(frozen=True)
class Periodicity:
    """The strongest spatial period of an image, from its 2-D power spectrum.

    * ``period_m``: real-space period 1/|k| of the strongest Fourier component (m, or the
      unit of ``dx``) — the spacing of the rows of maxima the component describes. For a
      hexagonal (triangular) lattice of constant a this is the row spacing √3/2·a, not a.
    * ``angle_deg``: direction of the wave vector k in [0, 180), measured from +x (along a
      scan line) towards +y (increasing row index), in physical units (non-square pixels
      are accounted for). The rows of maxima run perpendicular to it.
    * ``strength``: share (0–1) of the levelled, windowed image's variance carried by the
      peak and its mirror image (3×3 bins each); about 1 for a pure grating, about 1/3 for a
      hexagonal lattice (three pairs of spots), small for noise.
    * ``symmetry``: "hexagonal" when spots of similar power (≥ 1/4 of the peak) sit at the
      same |k| at ±60°, "square" when one sits at 90°, otherwise "none" — also "none" when
      the peak does not stand 20× above the median power at its |k| (noise, no lattice).
    * ``lattice_constant_m``: for "hexagonal" a = 2/√3 · period, for "square" a = period,
      otherwise None. Assumes the strongest spot is a first-order one, as on atomic
      lattices; on a lattice whose motif favours a higher order it would be a fraction of a.
    """

    period_m: float
    angle_deg: float
    strength: float
    symmetry: Symmetry
    lattice_constant_m: float | None


#: A Fourier peak counts as a lattice spot (and its symmetry is looked for) when it stands at
#: least this many times above the median power at the same |k|.
_SPOT_CONTRAST = 20.0


def _fft_module() -> tuple[Any, dict[str, Any]]:
    """scipy's pocketfft, which keeps float32 in single precision and runs ~3× faster than
    numpy's at 512² (0.5 against 1.4 ms for rfft2, measured); one thread, as with BLAS (see
    :func:`_dot`). Imported on first use: importing this module stays light."""
    try:
        import scipy.fft
    except ImportError:  # pragma: no cover - scipy is a dependency; numpy's FFT is the same
        return np.fft, {}
    return scipy.fft, {"workers": 1}


def _hann(n: int) -> np.ndarray:
    return np.hanning(n).astype(np.float32)


def _parabolic_offset(left: float, centre: float, right: float) -> float:
    """Sub-bin offset of a peak from three samples, by a parabola through their logarithms
    (a Gaussian through the powers: closer to the Hann window's main lobe than a parabola
    through the powers themselves)."""
    tiny = 1e-300
    lo, c, hi = (math.log(max(value, tiny)) for value in (left, centre, right))
    curvature = lo - 2.0 * c + hi
    if not curvature < 0.0:
        return 0.0
    return max(-0.5, min(0.5, 0.5 * (lo - hi) / curvature))


def _power_spectrum(image: np.ndarray, fit: _Fit) -> np.ndarray:
    """|FFT|² (float32, shape (ny, nx//2 + 1)) of the plane-levelled, Hann-windowed image.

    The transform runs in float32 (2.7× faster than float64 in numpy's pocketfft; peak
    positions need far less than its 1e-7 precision), one axis at a time over blocks,
    written into one half spectrum (the rfft's own output for a one-block image, else a
    preallocated one): numpy's rfft2 of a 4096² image holds
    ~380 MiB of temporaries, this ~100 MiB (the spectrum and its power). The rows are
    levelled (in float64) and windowed block by block on the way in, NaN pixels set to 0.
    """
    ny, nx = image.shape
    columns = nx // 2 + 1
    column_term, row_term = fit.terms()
    window_y, window_x = _hann(ny), _hann(nx)
    blocks = _row_blocks(ny, nx)
    fft, options = _fft_module()
    # scipy's rfft of a single block is the whole spectrum already (no copy into a
    # preallocated one), and each column chunk may be transformed in place: it is read once.
    whole = len(blocks) == 1 and fft is not np.fft
    spectrum = None if whole else np.empty((ny, columns), dtype=np.complex64)
    column_options = {**options, "overwrite_x": True} if fft is not np.fft else options
    # Levelled in float32 straight from the image: no float64 block (peak positions need far
    # less than float32's 1e-7 precision, see above).
    column_32, row_32 = column_term.astype(np.float32), row_term.astype(np.float32)
    windowed = _buffer("windowed", _block_shape(blocks, nx), np.float32)
    for rows in blocks:
        block = windowed[: rows.stop - rows.start]
        np.subtract(image[rows], column_32, out=block, casting="same_kind")
        block -= row_32[rows, None]
        if fit.has_nan:
            block[np.isnan(block)] = 0.0
        block *= window_y[rows, None]
        block *= window_x
        if spectrum is None:
            spectrum = fft.rfft(block, axis=1, **options)
        else:
            spectrum[rows] = fft.rfft(block, axis=1, **options)
    power = np.empty((ny, columns), dtype=np.float32)
    step = max(1, _BLOCK_ELEMENTS // ny)
    for start in range(0, columns, step):
        chunk = fft.fft(spectrum[:, start : start + step], axis=0, **column_options)
        np.multiply(chunk.real, chunk.real, out=power[:, start : start + step])
        power[:, start : start + step] += np.square(chunk.imag)
    return power


def _ring_median(power: np.ndarray, k: float, width: float, height: float) -> float:
    """Median power of the half spectrum on a ring ±1.5 bins wide around |k| (cycles/m).

    Noise has a strongest bin too. Only a spot well above the typical power at its own |k|
    is a lattice spot: the largest of M noise bins (exponentially distributed powers) is
    about ln M ≈ 6–8 times their median, also for the 1/f noise of scanned images, whose
    power falls with |k| but not around a ring. The ring is sampled (5 radii, a point per
    bin of circumference, duplicates dropped) instead of computing |k| for every bin, which
    would cost two float64 arrays of the spectrum's size.
    """
    ny, columns = power.shape
    bin_size = max(1.0 / width, 1.0 / height)
    turns = max(64, math.ceil(math.pi * k / bin_size * 2))
    angles = np.linspace(-math.pi / 2, math.pi / 2, turns)
    radii = k + 1.5 * bin_size * np.linspace(-1.0, 1.0, 5)
    q = np.rint(np.outer(radii, np.cos(angles)) * width).ravel()
    p = np.rint(np.outer(radii, np.sin(angles)) * height).ravel()
    inside = (q >= 0) & (q < columns) & (np.abs(p) <= ny // 2)
    index = np.unique((p[inside].astype(np.intp) % ny) * columns + q[inside].astype(np.intp))
    return float(np.median(power.reshape(-1)[index]))


def dominant_period(z: np.ndarray, *, dx: float, dy: float, min_cycles: float = 3.0) -> Periodicity:
    """The strongest periodicity of an image, from its 2-D FFT.

    Steps: level the plane (a tilt would put its power next to the centre), set NaN pixels
    to 0 (the levelled mean), multiply by a 2-D Hann window (no edge discontinuity, so no
    cross of leakage through the spectrum), take the power spectrum, leave out the centre
    (the DC bin and every spatial frequency below ``min_cycles`` cycles across the image, the
    window's main lobe around DC being ±2 bins wide), take the strongest bin and refine it to a
    fraction of a bin along each axis with :func:`_parabolic_offset` (the window's spectrum is
    separable, so the two axes refine independently). ``dx``, ``dy``: pixel spacings (m).

    The period of the bins is 1/(nx·dx) along x, so a period is resolved to about
    (period/image width)/10 after refinement: 0.1 % for 20 periods across the image.
    Raises ScienceInputError for an image with no structure at all (a perfect plane).
    """
    dx, dy = _spacing(dx, dy)
    image = _as_image(z, min_size=8)
    return _dominant_period(image, None, dx, dy, min_cycles)


def _dominant_period(
    image: np.ndarray, fit: _Fit | None, dx: float, dy: float, min_cycles: float
) -> Periodicity:
    """:func:`dominant_period` of a validated image, reusing its plane fit when known."""
    ny, nx = image.shape
    cycles = require_positive(min_cycles, "min_cycles")
    if min(ny, nx) < 8:
        raise ScienceInputError(f"z must be at least 8×8 pixels, got {ny}×{nx}", argument="z")
    if cycles >= min(ny, nx) / 2:
        raise ScienceInputError(
            f"min_cycles ({cycles:g}) leaves no spatial frequency in a {ny}×{nx} image",
            argument="min_cycles",
        )
    if fit is None:
        fit = _fit(image)
    power = _power_spectrum(image, fit)
    signed_rows = np.fft.fftfreq(ny, 1.0 / ny)  # row i holds p = signed_rows[i] cycles in y
    columns = np.arange(power.shape[1], dtype=np.float64)
    near = np.nonzero(np.abs(signed_rows) < cycles)[0]
    centre = signed_rows[near, None] ** 2 + columns[None, : math.ceil(cycles)] ** 2 < cycles**2
    sub = power[near, : math.ceil(cycles)]
    sub[centre] = 0.0
    power[near, : math.ceil(cycles)] = sub
    # Each interior column of the half spectrum stands for two bins of the full one (k, −k).
    weights = np.full(power.shape[1], 2.0)
    weights[0] = 1.0
    if nx % 2 == 0:
        weights[-1] = 1.0
    total = _dot(power.sum(axis=0, dtype=np.float64), weights)
    flat_index = int(np.argmax(power))
    row0, col0 = divmod(flat_index, power.shape[1])
    peak = float(power[row0, col0])
    if not peak > 0.0 or not math.isfinite(total):
        raise ScienceInputError(
            "z has no periodic structure (its levelled image is flat)", argument="z"
        )

    def full(row: int, col: int) -> float:
        # The full spectrum at (row, col) from the half one: P(−k) = P(k) for a real image.
        col %= nx
        if col < power.shape[1]:
            return float(power[row % ny, col])
        return float(power[(-row) % ny, nx - col])

    offset_x = _parabolic_offset(full(row0, col0 - 1), peak, full(row0, col0 + 1))
    offset_y = _parabolic_offset(full(row0 - 1, col0), peak, full(row0 + 1, col0))
    kx = (col0 + offset_x) / (nx * dx)
    ky = (signed_rows[row0] + offset_y) / (ny * dy)
    k = math.hypot(kx, ky)
    neighbourhood = sum(full(row0 + i, col0 + j) for i in (-1, 0, 1) for j in (-1, 0, 1))
    strength = min(1.0, 2.0 * neighbourhood / total)

    def present(angle_deg: float) -> bool:
        # Is there a spot of comparable power at the same |k|, turned by ``angle_deg``?
        turn = math.radians(angle_deg)
        qx = (kx * math.cos(turn) - ky * math.sin(turn)) * nx * dx
        qy = (kx * math.sin(turn) + ky * math.cos(turn)) * ny * dy
        if abs(qx) > nx / 2 or abs(qy) > ny / 2:
            return False
        row, col = round(qy), round(qx)
        best = max(full(row + i, col + j) for i in (-1, 0, 1) for j in (-1, 0, 1))
        return best >= 0.25 * peak

    distinct = peak >= _SPOT_CONTRAST * _ring_median(power, k, nx * dx, ny * dy)
    symmetry: Symmetry = "none"
    lattice_constant = None
    if distinct and present(60.0) and present(-60.0):
        symmetry, lattice_constant = "hexagonal", 2.0 / (math.sqrt(3.0) * k)
    elif distinct and present(90.0):
        symmetry, lattice_constant = "square", 1.0 / k
    return Periodicity(
        period_m=1.0 / k,
        angle_deg=math.degrees(math.atan2(ky, kx)) % 180.0,
        strength=strength,
        symmetry=symmetry,
        lattice_constant_m=lattice_constant,
    )


# --- the bundle -----------------------------------------------------------------------------


def _roughness_dict(value: Roughness) -> dict[str, Any]:
    data = asdict(value)
    return {key: data[key] for key in ("levelling", "rq", "ra", "rsk", "rku", "rz")}


def image_statistics(
    z: np.ndarray,
    *,
    dx: float,
    dy: float,
    coverage_threshold: float | None = None,
    coverage_relative_to: Reference = "min",
    bins: int = 256,
    line_method: LineMethod = "median",
    periodicity: bool = False,
) -> dict[str, Any]:
    """Everything ingestion stores about an image, as plain JSON-ready values.

    One plane fit, one pass that levels the image block by block and measures the levelled
    and the line-flattened surface, and one pass for the histogram (and coverage) of the
    levelled surface, whose range the first pass found. Keys:

    * ``shape`` [ny, nx], ``pixels``, ``finite_pixels``, ``width_m``, ``height_m`` (nx·dx,
      ny·dy);
    * ``mean``, ``std``, ``min``, ``max`` of the image as acquired (z units);
    * ``plane``: {a, b, c} of :func:`plane_fit`;
    * ``roughness``: Sq, Sa, Ssk, Sku, Sz of the plane-levelled surface (see
      :class:`Roughness`: keys rq, ra, rsk, rku, rz, levelling); ``roughness_lines``: the
      same after ``line_method`` line flattening;
    * ``histogram``: {bins, min, max, counts} of the plane-levelled surface;
    * ``coverage``: {threshold, relative_to, fraction} as :func:`coverage_fraction` (on the
      levelled surface), or None without ``coverage_threshold``;
    * ``periodicity``: :class:`Periodicity` as a dict when asked for (it costs one FFT,
      about as much again as the rest at 512²), else None; also None for a flat image.
    """
    dx, dy = _spacing(dx, dy)
    bins = _check_bins(bins)
    _check_line_method(line_method)
    coverage = None
    if coverage_threshold is not None:
        coverage = (require_finite(coverage_threshold, "coverage_threshold"), coverage_relative_to)
        _coverage_level(coverage_relative_to, 0.0, 0.0)  # reject an unknown reference early
    image = _as_image(z)
    levelled = _level_and_measure(image, line_method)
    plane_roughness = _roughness(levelled, levelled.plane, "plane")
    lines = levelled.lines if levelled.lines is not None else levelled.plane
    line_roughness = _roughness(levelled, lines, _levelling_name(line_method))
    second = _second_pass(image, levelled, bins=bins, coverage=coverage)
    plane = levelled.fit.plane(dx, dy)
    fit = levelled.fit
    del levelled  # the kept levelled block is no longer needed (the FFT levels afresh)
    ny, nx = image.shape
    result: dict[str, Any] = {
        "shape": [ny, nx],
        "pixels": ny * nx,
        "finite_pixels": plane_roughness.pixels,
        "width_m": nx * dx,
        "height_m": ny * dy,
        "mean": plane_roughness.mean,
        "std": plane_roughness.std,
        "min": plane_roughness.min,
        "max": plane_roughness.max,
        "plane": asdict(plane),
        "roughness": _roughness_dict(plane_roughness),
        "roughness_lines": _roughness_dict(line_roughness),
        "histogram": {
            "bins": bins,
            "min": second.low,
            "max": second.high,
            "counts": second.counts.tolist() if second.counts is not None else [],
        },
        "coverage": None,
        "periodicity": None,
    }
    if coverage is not None:
        result["coverage"] = {
            "threshold": coverage[0],
            "relative_to": coverage[1],
            "fraction": second.above / plane_roughness.pixels,
        }
    if periodicity:
        try:
            result["periodicity"] = asdict(_dominant_period(image, fit, dx, dy, 3.0))
        except ScienceInputError:
            result["periodicity"] = None
    return result
