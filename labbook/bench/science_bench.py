"""Science on acquired files: image thumbnail, statistics bundle, Savitzky–Golay dI/dV and the
memory of a large image, each against its floor measured in the same run (PERFORMANCE.md
rows 2a, 2c, 3 and 4).

No database is touched; registered as ``thumbnails``.
"""

from __future__ import annotations

import io
import statistics
import threading
import time
import tracemalloc
from collections.abc import Callable

import numpy as np
from PIL import Image

from labbook.bench import Figure, benchmark
from labbook.science.images import image_statistics
from labbook.science.spectra import savgol_derivative
from labbook.science.thumbnails import colormap_palette, thumbnail_png

MIB = 2**20


def _interleaved_ms(
    *jobs: Callable[[], object], repeat: int = 200, warmup: int = 20
) -> list[float]:
    """Median wall time (ms) of each job, run in turn within every round.

    Interleaving puts a job and its floor under the same machine load, so their ratio holds
    up on a shared machine where one after the other it can swing by 2× (seen here with other
    test runs on the second core).
    """
    for _ in range(warmup):
        for job in jobs:
            job()
    samples: list[list[float]] = [[] for _ in jobs]
    for _ in range(repeat):
        for job, times in zip(jobs, samples, strict=True):
            start = time.perf_counter()
            job()
            times.append((time.perf_counter() - start) * 1000)
    return [statistics.median(times) for times in samples]


def _topograph(size: int, seed: int = 3) -> np.ndarray:
    """A float32 test topograph: tilt, monatomic steps, an atomic corrugation and noise (m)."""
    rng = np.random.default_rng(seed)
    x, y = np.meshgrid(np.arange(size) * 1e-10, np.arange(size) * 1e-10)
    z = 0.01 * x + 0.02 * y + 2.08e-10 * np.floor(x / 1.5e-8)
    z += 2e-12 * np.cos(2 * np.pi * x / 2.55e-10) + rng.normal(0.0, 3e-12, z.shape)
    return z.astype(np.float32)


def _inline_thumbnail(z: np.ndarray, palette: bytes) -> bytes:
    """The floor written inline: closed-form plane, full-resolution 1–99 % clip by
    single-index partitions, BOX resize, palette PNG at level 1 (PERFORMANCE.md 2a)."""
    ny, nx = z.shape
    u = np.arange(nx) - (nx - 1) / 2
    v = np.arange(ny) - (ny - 1) / 2
    columns = z.sum(axis=0, dtype=np.float64)
    rows = z.sum(axis=1, dtype=np.float64)
    a = float((u * columns).sum()) / (ny * float((u * u).sum()))
    b = float((v * rows).sum()) / (nx * float((v * v).sum()))
    c = float(columns.sum()) / z.size
    levelled = z - (a * u).astype(np.float32)
    levelled -= (b * v + c).astype(np.float32)[:, None]
    flat = levelled.ravel().copy()
    k_high = int(0.99 * (flat.size - 1))
    flat.partition(k_high)
    high = float(flat[k_high])
    k_low = int(0.01 * (flat.size - 1))
    low_part = flat[:k_high]
    low_part.partition(k_low)
    low = float(low_part[k_low])
    levelled -= low
    levelled *= 255.0 / (high - low)
    np.clip(levelled, 0, 255, out=levelled)
    picture = Image.fromarray(levelled.astype(np.uint8)).resize((256, 256), Image.Resampling.BOX)
    picture.putpalette(palette, rawmode="RGB")
    out = io.BytesIO()
    picture.save(out, format="PNG", compress_level=1)
    return out.getvalue()


def _grey_png(indices: np.ndarray) -> bytes:
    out = io.BytesIO()
    Image.fromarray(indices).save(out, format="PNG", compress_level=6)
    return out.getvalue()


def _peak_memory_mib(z: np.ndarray) -> float:
    """Peak traced memory (MiB) of image_statistics + thumbnail_png on ``z``, input included.

    Run in a new thread so that the per-thread block buffers are allocated (and counted)
    afresh. tracemalloc sees numpy's allocations; Pillow's own image memory is not traced,
    which here is only the 256² output (64 KiB): the full-size index array is numpy's and
    Pillow reads it in place.
    """
    result: dict[str, float] = {}

    def run() -> None:
        tracemalloc.start()
        try:
            tracemalloc.reset_peak()
            start, _ = tracemalloc.get_traced_memory()
            image_statistics(z, dx=1e-10, dy=1e-10, coverage_threshold=1e-10)
            thumbnail_png(z)
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
        result["extra"] = (peak - start) / MIB

    worker = threading.Thread(target=run)
    worker.start()
    worker.join()
    return z.nbytes / MIB + result["extra"]


@benchmark("thumbnails")
def thumbnails() -> list[Figure]:
    z = _topograph(512)
    palette = colormap_palette()
    indices = np.asarray(Image.open(io.BytesIO(thumbnail_png(z))))  # the same 256² picture
    ours_ms, grey_ms, inline_ms = _interleaved_ms(
        lambda: thumbnail_png(z),
        lambda: _grey_png(indices),
        lambda: _inline_thumbnail(z, palette),
    )
    stats_ms, basic_ms = _interleaved_ms(
        lambda: image_statistics(z, dx=1e-10, dy=1e-10, coverage_threshold=1e-10),
        lambda: (z.mean(), z.std(), z.min(), z.max(), np.histogram(z, bins=256)),
    )

    bias = np.linspace(-1.0, 1.0, 2000)
    current = 1e-9 * np.sinh(2.0 * bias) + np.random.default_rng(5).normal(0, 1e-12, bias.size)
    step = float(bias[1] - bias[0])
    derivative_jobs: list[Callable[[], object]] = [
        lambda: savgol_derivative(current, dx=step),
        lambda: np.gradient(current, step),
    ]
    try:
        from scipy.signal import savgol_filter  # a test dependency, not always installed
    except ImportError:
        print("thumbnails: scipy not installed, no savgol_filter reference")
    else:
        derivative_jobs.append(
            lambda: savgol_filter(current, 21, 3, deriv=1, delta=step, mode="interp")
        )
    derivative_us = [1000 * ms for ms in _interleaved_ms(*derivative_jobs, repeat=2000)]
    savgol_us, gradient_us = derivative_us[:2]

    big = _topograph(4096)
    peak_mib = _peak_memory_mib(big)

    figures = [
        Figure(
            "512² float32 topograph → 256² palette PNG thumbnail, p50",
            ours_ms,
            "ms",
            grey_ms,
            "Pillow alone: the same 256² picture as uint8 greyscale PNG, compress_level 6",
            goal_ratio=2.0,
        ),
        Figure(
            "512² float32 topograph → 256² palette PNG thumbnail, p50",
            ours_ms,
            "ms",
            inline_ms,
            "closed-form plane + 1–99 % clip + BOX + palette PNG level 1, written inline",
            goal_ratio=1.3,
        ),
        Figure(
            "512² statistics bundle (plane, Sq/Sa/Ssk/Sku/Sz, line-flattened roughness, "
            "256-bin histogram, coverage), p50",
            stats_ms,
            "ms",
            basic_ms,
            "mean + std + min + max + numpy.histogram(256) on the same array",
            goal_ratio=2.0,
        ),
        Figure(
            "Savitzky–Golay dI/dV, 2,000 points, window 21, order 3, p50",
            savgol_us,
            "µs",
            gradient_us,
            "numpy.gradient over the same points",
            goal_ratio=4.0,
        ),
    ]
    if len(derivative_us) == 3:
        figures.append(
            Figure(
                "Savitzky–Golay dI/dV, 2,000 points, window 21, order 3, p50",
                savgol_us,
                "µs",
                derivative_us[2],
                "scipy.signal.savgol_filter(deriv=1, mode='interp') (reference, not a floor)",
                goal_ratio=0.5,
            )
        )
    figures.append(
        Figure(
            "peak memory of statistics + thumbnail on a 4096² float32 image (input included)",
            peak_mib,
            "MiB",
            big.nbytes / MIB,
            "the input array itself (64 MiB)",
            goal_ratio=2.5,
        )
    )
    return figures
