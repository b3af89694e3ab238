"""Images: plane fit, line flattening, roughness, histogram, coverage, FFT periodicity."""

import json
import math
import tracemalloc

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from labbook.science import images
from labbook.science.errors import ScienceInputError, UnknownNameError

RNG = np.random.default_rng(20240611)


def grid(ny, nx, dx=1.0, dy=1.0):
    """x (along columns) and y (along rows) of each pixel: x = j·dx, y = i·dy."""
    return np.meshgrid(np.arange(nx) * dx, np.arange(ny) * dy)


def lstsq_plane(z, dx=1.0, dy=1.0):
    """Reference: numpy.linalg.lstsq on the N×3 design matrix [x, y, 1] of the finite pixels."""
    x, y = grid(*z.shape, dx, dy)
    keep = np.isfinite(z)
    design = np.column_stack([x[keep], y[keep], np.ones(keep.sum())])
    return np.linalg.lstsq(design, z[keep].astype(np.float64), rcond=None)[0]


# --- plane fit --------------------------------------------------------------------------------


def test_exact_plane_is_recovered():
    # a plane is its own least-squares plane: coefficients back to rounding (1e-12)
    x, y = grid(64, 96, dx=0.5, dy=2.0)
    z = 0.37 * x - 1.25 * y + 4.5
    plane = images.plane_fit(z, dx=0.5, dy=2.0)
    assert plane.a == pytest.approx(0.37, abs=1e-12)
    assert plane.b == pytest.approx(-1.25, abs=1e-12)
    assert plane.c == pytest.approx(4.5, abs=1e-12)
    assert np.max(np.abs(images.level_plane(z))) < 1e-12


def test_exact_plane_in_si_units():
    # a tilted topograph in metres: 20 nm over 100 nm (dx = 0.2 nm), offset 3 nm
    x, y = grid(500, 500, dx=2e-10, dy=2e-10)
    z = 0.2 * x + 0.05 * y + 3e-9
    plane = images.plane_fit(z, dx=2e-10, dy=2e-10)
    assert plane.a == pytest.approx(0.2, rel=1e-12)
    assert plane.b == pytest.approx(0.05, rel=1e-12)
    assert plane.c == pytest.approx(3e-9, rel=1e-12)


@pytest.mark.parametrize(
    ("shape", "dtype"), [((37, 53), np.float64), ((128, 64), np.float32), ((1, 3), None)]
)
def test_plane_equals_lstsq_on_random_surfaces(shape, dtype):
    # outside reference: numpy.linalg.lstsq on the design matrix
    if dtype is None:  # a 1×3 image is too small for a plane in y
        with pytest.raises(ScienceInputError) as error:
            images.plane_fit(np.zeros(shape))
        assert error.value.argument == "z"
        return
    x, y = grid(*shape, dx=1.5, dy=0.7)
    z = (0.3 * x - 0.2 * y + 2.0 + RNG.standard_normal(shape)).astype(dtype)
    plane = images.plane_fit(z, dx=1.5, dy=0.7)
    assert [plane.a, plane.b, plane.c] == pytest.approx(lstsq_plane(z, 1.5, 0.7), rel=1e-9)


def test_plane_with_missing_pixels_equals_lstsq_over_the_finite_ones():
    # an aborted scan: NaN lines at the end and a few NaN pixels; lstsq over the finite pixels
    x, y = grid(80, 120)
    z = 0.01 * x + 0.03 * y + RNG.standard_normal((80, 120))
    z[60:] = np.nan
    z[5, 7] = z[30, 100] = np.nan
    plane = images.plane_fit(z)
    assert [plane.a, plane.b, plane.c] == pytest.approx(lstsq_plane(z), rel=1e-9)
    levelled = images.level_plane(z)
    assert np.isnan(levelled[60:]).all() and np.isnan(levelled[5, 7])
    assert np.nanmean(levelled) == pytest.approx(0.0, abs=1e-12)


def test_levelled_image_is_orthogonal_to_the_plane():
    # least-squares residuals are orthogonal to 1, x and y (normal equations)
    x, y = grid(50, 70)
    r = images.level_plane(RNG.standard_normal((50, 70)) + 0.1 * x)
    assert abs(np.sum(r)) < 1e-9
    assert abs(np.sum(r * x)) < 1e-8
    assert abs(np.sum(r * y)) < 1e-8


@pytest.mark.parametrize(
    "bad",
    [np.zeros(10), np.zeros((4, 4, 4)), np.zeros((1, 10)), np.full((5, 5), np.nan), "text"],
)
def test_invalid_images_name_the_argument(bad):
    with pytest.raises(ScienceInputError) as error:
        images.plane_fit(bad)
    assert error.value.argument == "z"


def test_infinite_pixels_are_refused():
    z = np.zeros((8, 8))
    z[2, 3] = np.inf
    for function in (images.plane_fit, images.roughness, images.histogram):
        with pytest.raises(ScienceInputError, match="infinite") as error:
            function(z)
        assert error.value.argument == "z"


def test_collinear_finite_pixels_have_no_plane():
    z = np.full((6, 6), np.nan)
    z[2, :] = 1.0  # one line of finite pixels
    with pytest.raises(ScienceInputError, match="line"):
        images.plane_fit(z)


def test_spacings_must_be_positive():
    with pytest.raises(ScienceInputError) as error:
        images.plane_fit(np.zeros((4, 4)), dx=0.0)
    assert error.value.argument == "dx"


# --- line flattening --------------------------------------------------------------------------


@pytest.mark.parametrize("method", ["median", "mean"])
def test_line_offsets_are_removed(method):
    # each scan line shifted by its own offset (tip change, feedback drift)
    offsets = RNG.normal(0.0, 5.0, size=(40, 1))
    z = offsets + RNG.standard_normal((40, 61))
    flat = images.flatten_lines(z, method)
    reduce = np.median if method == "median" else np.mean
    assert np.max(np.abs(reduce(flat, axis=1))) < 1e-12
    assert flat - z == pytest.approx(np.broadcast_to(-reduce(z, axis=1)[:, None], z.shape))


def test_even_row_median_matches_numpy():
    z = RNG.standard_normal((9, 64))  # even row length: mean of the two middle values
    flat = images.flatten_lines(z, "median")
    assert z - flat == pytest.approx(np.broadcast_to(np.median(z, axis=1)[:, None], z.shape))


def row_median_cases():
    """Finite blocks that stress the float32 ranking of the row medians: distinct values,
    values closer than float32 resolves (ties there, not in float64), quantised and
    constant rows, values beyond float32's range (±inf there) and below it (zero there)."""
    rng = np.random.default_rng(5)
    yield "normal even", rng.standard_normal((64, 512))
    yield "normal odd", rng.standard_normal((64, 301))
    near = 1.0 + rng.integers(0, 3, (64, 512)) * 1e-12 + rng.integers(0, 50, (64, 512)) * 1e-9
    yield "float32 ties", near  # 1e-12 apart: one float32 value, three float64 ones
    few = rng.standard_normal((64, 512))
    few[:3] = 1.0 + rng.integers(0, 4, (3, 512)) * 1e-13  # only three rows tie
    yield "few tied rows", few
    yield "quantised", rng.integers(-5, 5, (64, 512)).astype(np.float64)
    yield "constant", np.full((8, 512), -2.5)
    yield "beyond float32", rng.standard_normal((16, 512)) * 1e300
    yield "below float32", rng.standard_normal((16, 512)) * 1e-300
    yield "one pixel rows", rng.standard_normal((16, 1))
    yield "two pixel rows", rng.standard_normal((16, 2))
    yield "long rows", rng.standard_normal((4, 2001))  # beyond _SORTED_ROW_MAX: partitioned


def test_row_medians_equal_numpy_bit_for_bit():
    # outside reference: numpy.median along rows (float64); equality, not approximate: the
    # float32 ranking must pick the float64 order statistics themselves
    for name, block in row_median_cases():
        scratch = np.empty_like(block)
        got = images._row_medians(block, scratch)
        np.testing.assert_array_equal(got, np.median(block, axis=1), err_msg=name)


def test_linear_line_flattening_matches_polyfit():
    # outside reference: numpy.polyfit(x, row, 1) per line
    x = np.arange(50.0)
    z = RNG.normal(0, 1, (12, 1)) * x + RNG.normal(0, 3, (12, 1)) + RNG.standard_normal((12, 50))
    flat = images.flatten_lines(z, "linear")
    for row, result in zip(z, flat, strict=True):
        slope, intercept = np.polyfit(x, row, 1)
        assert result == pytest.approx(row - (slope * x + intercept), abs=1e-10)


def test_linear_flattening_with_missing_pixels_fits_the_finite_ones():
    x = np.arange(30.0)
    z = 0.5 * x + 2.0 + RNG.standard_normal((4, 30)) * 0.1
    z[1, :10] = np.nan
    z[3, :] = np.nan  # an unscanned line stays NaN
    flat = images.flatten_lines(z, "linear")
    keep = np.isfinite(z[1])
    slope, intercept = np.polyfit(x[keep], z[1, keep], 1)
    assert flat[1, keep] == pytest.approx(z[1, keep] - (slope * x[keep] + intercept), abs=1e-10)
    assert np.isnan(flat[1, :10]).all() and np.isnan(flat[3]).all()


def test_unknown_line_method():
    with pytest.raises(UnknownNameError) as error:
        images.flatten_lines(np.zeros((3, 3)), "cubic")
    assert error.value.argument == "method"


# --- roughness --------------------------------------------------------------------------------


def grating(periods, samples_per_period, amplitude, rows=32):
    """z = A·sin(2π(x − x̄)/λ + π/2) over an integer number of periods along x.

    The phase makes the grating even about the image centre, so its least-squares plane is
    exactly flat and levelling leaves it unchanged; with sin(2πx/λ) itself the levelling
    would also take out the slope that correlates with x (6/(π²N²) of the variance for N
    periods) and the analytic values below would not hold.
    """
    n = periods * samples_per_period
    u = np.arange(n) - (n - 1) / 2
    row = amplitude * np.sin(2 * np.pi * u / samples_per_period + np.pi / 2)
    return np.tile(row, (rows, 1))


def test_sine_grating_matches_the_analytic_roughness():
    # ISO 25178-2 definitions (Sq = sqrt(mean z²), Sa = mean |z|) of z = A sin(kx):
    # Sq = A/√2, Sa = 2A/π, Ssk = 0, Sku = <sin⁴>/<sin²>² = (3/8)/(1/4) = 1.5, Sz = 2A
    amplitude = 0.8e-10  # 0.8 Å corrugation
    z = grating(periods=12, samples_per_period=64, amplitude=amplitude) + 5e-9
    result = images.roughness(z)
    assert result.rq == pytest.approx(amplitude / math.sqrt(2), rel=1e-12)
    assert result.sq == result.rq
    # Sa on a sampled grating: mean |cos| over 64 points per period differs from 2/π by
    # O(1/P²); 1e-3 covers it
    assert result.ra == pytest.approx(2 * amplitude / math.pi, rel=1e-3)
    assert result.sa == result.ra
    assert result.rsk == pytest.approx(0.0, abs=1e-9)
    assert result.rku == pytest.approx(1.5, rel=1e-12)
    # the sampled maximum misses the crest by at most half a sample: cos(π/64)
    assert result.rz == pytest.approx(2 * amplitude, rel=1 - math.cos(math.pi / 64) + 1e-12)
    assert result.levelling == "plane"


def test_gaussian_surface_has_gaussian_moments():
    # a normal distribution has skewness 0 and kurtosis 3 (statistical: 262144 samples)
    z = RNG.normal(0.0, 2e-11, (512, 512))
    result = images.roughness(z)
    assert result.rq == pytest.approx(2e-11, rel=0.01)
    assert result.ra == pytest.approx(2e-11 * math.sqrt(2 / math.pi), rel=0.01)
    assert result.rsk == pytest.approx(0.0, abs=0.02)
    assert result.rku == pytest.approx(3.0, abs=0.05)


@pytest.mark.parametrize("shape", [(300, 200), (700, 1000)])  # one block, then several
@pytest.mark.parametrize("with_nan", [False, True])
def test_roughness_equals_direct_numpy_on_the_levelled_surface(shape, with_nan):
    x, y = grid(*shape)
    z = 1e-3 * x - 2e-3 * y + RNG.gamma(2.0, 1.0, shape)  # skewed heights
    if with_nan:
        z[::7, 3] = np.nan
        z[-20:] = np.nan
    levelled = images.level_plane(z)
    r = levelled[np.isfinite(levelled)]
    sq = math.sqrt(np.mean(r**2))
    result = images.roughness(z)
    assert result.rq == pytest.approx(sq, rel=1e-12)
    assert result.ra == pytest.approx(np.mean(np.abs(r)), rel=1e-12)
    assert result.rsk == pytest.approx(np.mean(r**3) / sq**3, rel=1e-10)
    assert result.rku == pytest.approx(np.mean(r**4) / sq**4, rel=1e-10)
    assert result.rz == pytest.approx(r.max() - r.min(), rel=1e-12)
    assert result.mean == pytest.approx(np.nanmean(z), rel=1e-12)
    assert result.std == pytest.approx(np.nanstd(z), rel=1e-10)
    assert (result.min, result.max) == (np.nanmin(z), np.nanmax(z))
    assert result.pixels == r.size
    lines = images.roughness(z, line_method="median")
    flat = images.flatten_lines(levelled, "median")
    f = flat[np.isfinite(flat)]
    assert lines.rq == pytest.approx(math.sqrt(np.mean(f**2)), rel=1e-12)
    assert lines.ra == pytest.approx(np.mean(np.abs(f)), rel=1e-12)
    assert lines.levelling == "plane+lines:median"


def test_line_flattened_roughness_drops_the_line_jumps():
    noise = RNG.normal(0.0, 1e-11, (256, 256))
    jumps = RNG.normal(0.0, 1e-10, (256, 1))  # 1 Å line-to-line offsets dominate
    plane = images.roughness(noise + jumps)
    lines = images.roughness(noise + jumps, line_method="median")
    assert plane.rq > 5 * lines.rq
    assert lines.rq == pytest.approx(1e-11, rel=0.02)


def test_flat_surface_has_no_skewness_or_kurtosis():
    x, y = grid(20, 30)
    result = images.roughness(0.2 * x + 0.1 * y + 7.0)
    assert result.rq < 1e-12
    assert result.rsk is None and result.rku is None


# --- histogram and coverage -------------------------------------------------------------------


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.int16])
def test_histogram_equals_numpy(dtype):
    # outside reference: numpy.histogram over the data range, in float64 (for float32 data
    # numpy rounds its edges to float32 and then bins values within an ulp of an edge
    # differently; ours keeps float64 edges)
    z = (RNG.standard_normal((300, 1000)) * 1000).astype(dtype)
    reference_counts, reference_edges = np.histogram(z.astype(np.float64), bins=256)
    result = images.histogram(z, bins=256)
    assert result.counts.tolist() == reference_counts.tolist()
    assert result.edges == pytest.approx(reference_edges, rel=1e-12)


def test_histogram_ignores_nan_and_handles_a_constant_image():
    z = np.full((10, 10), 3.0)
    z[0, 0] = np.nan
    result = images.histogram(z, bins=4)
    reference_counts, reference_edges = np.histogram(np.full(99, 3.0), bins=4)
    assert result.counts.tolist() == reference_counts.tolist()
    assert result.edges.tolist() == reference_edges.tolist()
    with pytest.raises(ScienceInputError) as error:
        images.histogram(z, bins=0)
    assert error.value.argument == "bins"


def island_image(tilt=True):
    """A 200×200 substrate with 16 square islands of 10×10 pixels, 2 Å high.

    The islands sit on a grid symmetric about the image centre, so they add no slope to the
    least-squares plane: levelling removes exactly the tilt. Island area: 1600 of 40000
    pixels = 0.04.
    """
    z = np.zeros((200, 200))
    for i in range(4):
        for j in range(4):
            z[25 + 45 * i : 35 + 45 * i, 25 + 45 * j : 35 + 45 * j] = 2e-10
    z += RNG.normal(0.0, 5e-12, z.shape)  # 0.05 Å of noise, far below the island height
    if tilt:
        x, y = grid(200, 200, 1e-10, 1e-10)
        z += 0.05 * x - 0.03 * y
    return z


def test_coverage_of_synthetic_islands():
    # known area: 16 islands × 100 pixels / 40000 pixels = 0.04
    z = island_image()
    assert images.coverage_fraction(z, 1e-10) == pytest.approx(0.04, abs=1e-12)
    assert images.coverage_fraction(island_image(tilt=False), 1e-10, level=False) == 0.04
    # "absolute" on the levelled image: the mean plane sits at 0.04 × 2 Å above the substrate
    assert images.coverage_fraction(z, 0.5e-10, relative_to="absolute") == pytest.approx(0.04)


def test_coverage_ignores_missing_pixels_and_checks_its_arguments():
    z = island_image(tilt=False)
    z[:, :20] = np.nan  # no islands there: 1600 of 36000 finite pixels
    assert images.coverage_fraction(z, 1e-10, level=False) == pytest.approx(1600 / 36000)
    with pytest.raises(UnknownNameError) as error:
        images.coverage_fraction(z, 1e-10, relative_to="median")
    assert error.value.argument == "relative_to"
    with pytest.raises(ScienceInputError) as error:
        images.coverage_fraction(z, float("nan"))
    assert error.value.argument == "threshold"


# --- periodicity ------------------------------------------------------------------------------


def lattice(shape, a, kind, angle_deg=0.0, dx=1.0, dy=1.0, noise=0.3):
    """Cosine lattices: "square" (k at 0° and 90°, |k| = 1/a), "hex" (k at 0°, 60°, 120°,
    |k| = 2/(√3 a): a triangular lattice of constant a), "stripes" (k at 0°, 1/a)."""
    x, y = grid(*shape, dx, dy)
    angles, k = {"square": ([0, 90], 1 / a), "hex": ([0, 60, 120], 2 / (math.sqrt(3) * a))}.get(
        kind, ([0], 1 / a)
    )
    z = np.zeros(shape)
    for angle in angles:
        t = math.radians(angle + angle_deg)
        z += np.cos(2 * np.pi * k * (x * math.cos(t) + y * math.sin(t)))
    return z + noise * RNG.standard_normal(shape) + 0.002 * x  # noise and a tilt


def angle_difference(a, b, period):
    d = (a - b) % period
    return min(d, period - d)


def test_square_lattice_period():
    # known period 3.61 Å (a Cu(100)-like 2.55 Å… here simply a = 3.61 Å), 0.1 Å pixels
    z = lattice((256, 256), 3.61e-10, "square", dx=0.1e-10, dy=0.1e-10)
    result = images.dominant_period(z, dx=0.1e-10, dy=0.1e-10)
    assert result.period_m == pytest.approx(3.61e-10, rel=0.01)
    assert result.symmetry == "square"
    assert result.lattice_constant_m == pytest.approx(3.61e-10, rel=0.01)
    assert angle_difference(result.angle_deg, 0.0, 90.0) < 1.0


def test_hexagonal_lattice_gives_the_row_spacing():
    # graphite's a = 2.464 Å (REFERENCES.md §8, Trucano & Chen): the strongest spots give
    # the row spacing √3/2·a = 2.134 Å; the hexagonal estimate returns a itself
    a = 2.464e-10
    z = lattice((256, 256), a, "hex", dx=0.12e-10, dy=0.12e-10)
    result = images.dominant_period(z, dx=0.12e-10, dy=0.12e-10)
    assert result.period_m == pytest.approx(math.sqrt(3) / 2 * a, rel=0.01)
    assert result.symmetry == "hexagonal"
    assert result.lattice_constant_m == pytest.approx(a, rel=0.01)
    assert 0.2 < result.strength < 0.4  # three pairs of spots share the variance


@pytest.mark.parametrize(("kind", "fold"), [("hex", 60.0), ("square", 90.0), ("stripes", 180.0)])
@pytest.mark.parametrize("angle", [17.0, 41.5, 128.0])
def test_rotated_lattice_angle(kind, fold, angle):
    z = lattice((200, 240), 9.3, kind, angle_deg=angle)
    result = images.dominant_period(z, dx=1.0, dy=1.0)
    assert angle_difference(result.angle_deg, angle, fold) < 1.0
    expected = math.sqrt(3) / 2 * 9.3 if kind == "hex" else 9.3
    assert result.period_m == pytest.approx(expected, rel=0.01)


def test_non_square_pixels_are_accounted_for():
    # 512×128 pixels over a square area: dy = 4 dx; the lattice is square in real space
    z = lattice((128, 512), 2.0, "stripes", angle_deg=30.0, dx=0.1, dy=0.4)
    result = images.dominant_period(z, dx=0.1, dy=0.4)
    assert result.period_m == pytest.approx(2.0, rel=0.01)
    assert angle_difference(result.angle_deg, 30.0, 180.0) < 1.0


def test_noise_has_no_lattice():
    result = images.dominant_period(RNG.standard_normal((256, 256)), dx=1.0, dy=1.0)
    assert result.symmetry == "none"
    assert result.lattice_constant_m is None
    assert result.strength < 0.01


def test_periodicity_input_checks():
    with pytest.raises(ScienceInputError) as error:
        images.dominant_period(np.zeros((4, 64)), dx=1.0, dy=1.0)
    assert error.value.argument == "z"
    x, _ = grid(32, 32)
    with pytest.raises(ScienceInputError, match="no periodic"):
        images.dominant_period(0.5 * x, dx=1.0, dy=1.0)  # a pure plane
    with pytest.raises(ScienceInputError) as error:
        images.dominant_period(np.ones((32, 32)), dx=1.0, dy=1.0, min_cycles=16)
    assert error.value.argument == "min_cycles"


# --- the bundle -------------------------------------------------------------------------------


def test_image_statistics_bundle_agrees_with_the_parts():
    z = island_image().astype(np.float32)
    stats = images.image_statistics(
        z, dx=1e-10, dy=1e-10, coverage_threshold=1e-10, periodicity=True
    )
    json.dumps(stats, allow_nan=False)  # plain JSON values only
    assert stats["shape"] == [200, 200] and stats["finite_pixels"] == 40000
    assert stats["width_m"] == pytest.approx(200e-10)
    plane = images.plane_fit(z, dx=1e-10, dy=1e-10)
    assert stats["plane"]["a"] == pytest.approx(plane.a, rel=1e-12)
    rough = images.roughness(z)
    assert stats["roughness"]["rq"] == pytest.approx(rough.rq, rel=1e-12)
    assert stats["mean"] == pytest.approx(float(np.mean(z, dtype=np.float64)), rel=1e-9)
    assert stats["std"] == pytest.approx(float(np.std(z, dtype=np.float64)), rel=1e-6)
    lines = images.roughness(z, line_method="median")
    assert stats["roughness_lines"]["rq"] == pytest.approx(lines.rq, rel=1e-12)
    counts, edges = np.histogram(images.level_plane(z), bins=256)
    assert stats["histogram"]["counts"] == counts.tolist()
    assert stats["histogram"]["min"] == pytest.approx(edges[0], rel=1e-12)
    assert stats["coverage"]["fraction"] == pytest.approx(0.04, abs=1e-12)
    assert stats["periodicity"]["period_m"] > 0


def test_image_statistics_without_extras():
    stats = images.image_statistics(RNG.standard_normal((6, 5)), dx=1.0, dy=1.0)
    assert stats["coverage"] is None and stats["periodicity"] is None
    assert sum(stats["histogram"]["counts"]) == 30


def test_statistics_and_thumbnail_memory_stay_bounded():
    # the design bound: ~one input-sized working array, not several float64 copies
    from labbook.science.thumbnails import thumbnail_png

    z = RNG.standard_normal((1024, 1024)).astype(np.float32)  # 4 MiB
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        start, _ = tracemalloc.get_traced_memory()
        images.image_statistics(z, dx=1.0, dy=1.0, coverage_threshold=0.5)
        thumbnail_png(z)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    extra_mib = (peak - start) / 2**20
    assert extra_mib < 4 * 1.25 + 10  # one float32 copy (+25 %) and the 10 MiB of block buffers


finite_images = hnp.arrays(
    dtype=st.sampled_from([np.float64, np.float32]),
    shape=st.tuples(st.integers(2, 12), st.integers(2, 12)),
    elements=st.floats(-(2.0**100), 2.0**100, allow_nan=False, allow_infinity=False, width=32),
)


def numbers(value):
    if isinstance(value, dict):
        for item in value.values():
            yield from numbers(item)
    elif isinstance(value, list):
        for item in value:
            yield from numbers(item)
    elif isinstance(value, float):
        yield value


@settings(max_examples=150, deadline=None)
@given(finite_images, st.floats(-1e3, 1e3, allow_nan=False))
def test_finite_images_never_give_nan_statistics(z, threshold):
    stats = images.image_statistics(z, dx=1.0, dy=1.0, coverage_threshold=threshold)
    values = list(numbers(stats))
    assert all(math.isfinite(value) for value in values)
    assert stats["roughness"]["rq"] >= 0.0 and stats["std"] >= 0.0
    assert sum(stats["histogram"]["counts"]) == z.size
