"""Thumbnails: palette PNGs of images and small spectrum plots, without matplotlib figures."""

import io

import numpy as np
import pytest
from PIL import Image

from labbook.science import thumbnails
from labbook.science.errors import ScienceInputError, UnknownNameError

RNG = np.random.default_rng(7)


def decode(png: bytes) -> Image.Image:
    picture = Image.open(io.BytesIO(png))
    picture.load()
    return picture


def terraces(ny=300, nx=500):
    """A tilted stepped surface with noise (a real-looking topograph, in metres)."""
    x, y = np.meshgrid(np.arange(nx) * 1e-10, np.arange(ny) * 1e-10)
    steps = 2.08e-10 * np.floor(x / 1.2e-8)  # Cu(111) monatomic steps, 2.08 Å (a/√3)
    return (steps + 0.01 * x + 0.02 * y + RNG.normal(0, 5e-12, (ny, nx))).astype(np.float32)


def test_thumbnail_is_a_palette_png_with_the_longest_side():
    picture = decode(thumbnails.thumbnail_png(terraces()))
    assert picture.format == "PNG"
    assert picture.mode == "P"
    assert picture.size == (256, 154)  # 500×300 pixels: 256 × round(256·300/500)
    palette = picture.getpalette()
    assert bytes(palette[:768]) == thumbnails.colormap_palette("inferno")


def test_aspect_follows_the_physical_size():
    z = RNG.standard_normal((100, 400))
    assert decode(thumbnails.thumbnail_png(z)).size == (256, 64)
    # 400 × 100 pixels of 1 × 4 units: a square area
    assert decode(thumbnails.thumbnail_png(z, dx=1.0, dy=4.0)).size == (256, 256)
    tall = RNG.standard_normal((300, 100))
    assert decode(thumbnails.thumbnail_png(tall, longest_side=128)).size == (43, 128)


def test_small_images_are_enlarged_pixel_by_pixel():
    z = np.arange(16.0).reshape(4, 4) ** 2
    picture = decode(thumbnails.thumbnail_png(z, level=False, clip=None, longest_side=8))
    indices = np.asarray(picture)
    assert indices.shape == (8, 8)
    # NEAREST keeps each source pixel as a 2×2 block
    assert (indices[::2, ::2] == indices[1::2, 1::2]).all()
    assert indices[0, 0] == 0 and indices[-1, -1] == 255


def test_clip_keeps_a_hot_pixel_from_washing_out_the_image():
    z = terraces()
    z[150, 250] = 1e-7  # a 1000 Å spike (tip crash), one pixel
    clipped = np.asarray(decode(thumbnails.thumbnail_png(z)))
    unclipped = np.asarray(decode(thumbnails.thumbnail_png(z, clip=None)))
    # without the clip every other pixel is squeezed into the bottom few colours
    assert len(np.unique(unclipped)) < 10
    assert np.percentile(unclipped, 99) <= 3
    # with the 1–99 % clip (at full resolution) the terraces use the whole table
    assert len(np.unique(clipped)) > 200
    assert np.percentile(clipped, 10) < 40 and np.percentile(clipped, 90) > 215


def test_levelling_takes_out_the_tilt():
    x, y = np.meshgrid(np.arange(256.0), np.arange(256.0))
    tilted = 0.5 * x + 0.2 * y + RNG.normal(0.0, 0.01, (256, 256))
    levelled = np.asarray(decode(thumbnails.thumbnail_png(tilted)))
    raw = np.asarray(decode(thumbnails.thumbnail_png(tilted, level=False)))
    # the tilt dominates the unlevelled picture: dark at the top-left, bright bottom-right
    assert raw[:32, :32].mean() < 30 and raw[-32:, -32:].mean() > 225
    # the levelled one is noise: the corners look alike
    assert abs(float(levelled[:32, :32].mean()) - float(levelled[-32:, -32:].mean())) < 20


def test_same_input_gives_the_same_bytes():
    z = terraces()
    first = thumbnails.thumbnail_png(z)
    assert thumbnails.thumbnail_png(z.copy()) == first
    assert thumbnails.thumbnail_png(z) == first


def test_missing_pixels_are_drawn_with_the_first_colour():
    z = terraces().astype(np.float64)
    z[:100] = np.nan  # an aborted scan
    indices = np.asarray(decode(thumbnails.thumbnail_png(z, longest_side=500)))
    assert (indices[:100] == 0).all()
    assert indices[100:].max() == 255


def test_percentiles_match_numpy():
    # outside reference: numpy.percentile (linear interpolation between ranks)
    for size in (2, 3, 101, 10_000):
        values = RNG.standard_normal(size)
        for low, high in ((1, 99), (0, 100), (2.5, 97.5), (50, 50.001)):
            expected = np.percentile(values, [low, high])
            got = thumbnails._percentiles(values.copy(), size, low, high)
            assert got == pytest.approx(expected, rel=1e-12, abs=1e-12)
    values = RNG.standard_normal(1000)
    values[::7] = np.nan  # NaN sorts last and is left out
    got = thumbnails._percentiles(values.copy(), int(np.isfinite(values).sum()), 1, 99)
    assert got == pytest.approx(np.nanpercentile(values, [1, 99]), rel=1e-12)


def percentile_cases():
    """Arrays that stress the guarded selection: smooth, heavy-tailed, tied, constant, NaN,
    sorted, tiny, and ones whose strided or sampled pixels are unrepresentative."""
    rng = np.random.default_rng(11)
    n = 300_000
    yield "normal", rng.standard_normal(n).astype(np.float32)
    yield "cauchy", rng.standard_cauchy(n)
    yield "quantised", rng.integers(0, 40, n).astype(np.float32)  # heavy ties
    yield "two levels", np.repeat([0.0, 1.0], n // 2)
    yield "constant", np.full(n, 3.5, dtype=np.float32)
    yield "ascending", np.arange(n, dtype=np.float64)
    yield "descending", np.arange(n, dtype=np.float32)[::-1].copy()
    spiky = rng.standard_normal(n)
    spiky[::37] = 1e6  # every 37th pixel a spike: 2.7 % of them, beyond the 99th percentile
    yield "spiky", spiky
    with_nan = rng.standard_normal(n).astype(np.float32)
    with_nan[rng.random(n) < 0.3] = np.nan
    yield "30 % NaN", with_nan
    mostly_nan = rng.standard_normal(n)
    mostly_nan[: n - 40_000] = np.nan  # an aborted scan: the sample sees few finite pixels
    yield "mostly NaN", mostly_nan
    lattice = np.cos(2 * np.pi * np.arange(n) / 12.8) + 1e-3 * rng.standard_normal(n)
    yield "lattice", lattice
    for size in (1, 2, 3, 7, 1000):
        yield f"tiny {size}", rng.standard_normal(size)
    # Adversarial for the sample: the pixels it looks at are all large, so its guess for
    # the high guard is far too high (the answer must still be exact).
    tricky = rng.standard_normal(n)
    tricky[thumbnails._sample_positions(n)] = 50.0 + rng.random(thumbnails._GUARD_SAMPLE)
    yield "sample-adversarial", tricky


@pytest.mark.parametrize("clip", [(1, 99), (0, 100), (2.5, 97.5), (0.1, 99.9), (49, 51)])
def test_percentiles_equal_numpy_bit_for_bit(clip):
    # outside reference: numpy.nanpercentile (default "linear" method) in float64; equality,
    # not approximate: the guarded selection finds the same ranks and interpolates as numpy
    for name, values in percentile_cases():
        finite = int(np.count_nonzero(~np.isnan(values)))
        expected = np.nanpercentile(values.astype(np.float64), clip)
        got = thumbnails._percentiles(values.copy(), finite, *clip)
        assert got == (expected[0], expected[1]), name


def test_guarded_selection_is_used_and_falls_back_when_fooled():
    # the fast path must be the one a normal image takes, and a fooled guess must be caught
    cases = dict(percentile_cases())
    for name, expected_path in (("normal", True), ("sample-adversarial", False)):
        values = cases[name]
        n = values.size
        low, high = thumbnails._linear_rank(1, n), thumbnails._linear_rank(99, n)
        kept = values.copy()
        found = thumbnails._guarded_statistics(kept, n, low[:2], high[:2])
        assert (found is not None) == expected_path, name
        np.testing.assert_array_equal(kept, values)  # never reordered
        if found is not None:
            # outside reference: numpy.sort gives the order statistics directly
            ordered = np.sort(values.astype(np.float64))
            assert found == tuple(ordered[[low[0], low[1], high[0], high[1]]])


def test_thumbnail_is_the_same_whichever_way_the_percentiles_are_found(monkeypatch):
    # the in-place mapping of the intact levelled copy and the re-levelling after a full
    # partition must give the same bytes (both are exact), at 512² and for a 2-block image
    for z in (terraces(512, 512), terraces(600, 500)):
        fast = thumbnails.thumbnail_png(z)
        with monkeypatch.context() as patch:
            patch.setattr(thumbnails, "_guarded_statistics", lambda *args: None)
            slow = thumbnails.thumbnail_png(z)
        assert fast == slow


def test_palette_comes_from_the_colormap_table():
    import matplotlib

    table = matplotlib.colormaps["viridis"].resampled(256)(np.arange(256), bytes=True)
    assert thumbnails.colormap_palette("viridis") == table[:, :3].tobytes()
    assert len(thumbnails.colormap_palette()) == 768


def test_no_matplotlib_figure_is_made(monkeypatch):
    # PERFORMANCE.md §2: a Figure costs 10× the whole thumbnail; only the colour table is used
    import matplotlib.figure

    def refuse(*args, **kwargs):
        raise AssertionError("a matplotlib Figure was made")

    monkeypatch.setattr(matplotlib.figure.Figure, "__init__", refuse)
    thumbnails.colormap_palette.cache_clear()
    assert decode(thumbnails.thumbnail_png(terraces(), colormap="cividis")).mode == "P"
    assert decode(thumbnails.spectrum_png(np.linspace(-1, 1, 50), np.ones(50))).mode == "P"


@pytest.mark.parametrize(
    ("kwargs", "argument"),
    [
        ({"colormap": "no-such-map"}, "colormap"),
        ({"clip": (99, 1)}, "clip"),
        ({"clip": (1,)}, "clip"),
        ({"longest_side": 0}, "longest_side"),
        ({"dx": -1.0}, "dx"),
    ],
)
def test_bad_thumbnail_arguments_name_themselves(kwargs, argument):
    with pytest.raises(ScienceInputError) as error:
        thumbnails.thumbnail_png(terraces(), **kwargs)
    assert error.value.argument == argument


def test_unknown_colormap_is_an_unknown_name():
    with pytest.raises(UnknownNameError):
        thumbnails.colormap_palette("no-such-map")


def test_all_nan_image_is_refused():
    with pytest.raises(ScienceInputError) as error:
        thumbnails.thumbnail_png(np.full((10, 10), np.nan), level=False)
    assert error.value.argument == "z"


# --- spectra ----------------------------------------------------------------------------------


def test_spectrum_plot_draws_the_trace_corner_to_corner():
    bias = np.linspace(-1.0, 1.0, 401)
    picture = decode(thumbnails.spectrum_png(bias, bias * 2e-9))  # a rising line
    assert picture.mode == "P" and picture.size == (256, 160)
    pixels = np.asarray(picture)
    trace = pixels == 3
    rows, columns = np.nonzero(trace)
    # starts at the bottom left and ends at the top right of the plot area
    assert columns.min() <= 6 and columns.max() >= 249
    assert rows[columns == columns.min()].max() >= 145
    assert rows[columns == columns.max()].min() <= 14
    assert (pixels[0, :] == 1).all() and (pixels[:, 0] == 1).all()  # the frame
    assert (pixels == 2).any()  # the V = 0 and y = 0 lines


def test_spectrum_plot_with_gaps_and_several_traces():
    bias = np.linspace(-0.5, 0.5, 100)
    forward = np.sin(6 * bias)
    backward = forward + 0.2
    forward[40:50] = np.nan
    pixels = np.asarray(decode(thumbnails.spectrum_png(bias, np.stack([forward, backward]))))
    assert (pixels == 3).any() and (pixels == 4).any()
    assert thumbnails.spectrum_png(bias, forward) == thumbnails.spectrum_png(bias, forward)


@pytest.mark.parametrize(
    ("bias", "y", "argument"),
    [
        (np.zeros(10), np.zeros(10), "bias_v"),  # no range
        (np.linspace(0, 1, 10), np.zeros(9), "y"),
        (np.linspace(0, 1, 10), np.full(10, np.nan), "y"),
        (np.array([0.0, np.nan, 1.0]), np.zeros(3), "bias_v"),
    ],
)
def test_bad_spectra_name_the_argument(bias, y, argument):
    with pytest.raises(ScienceInputError) as error:
        thumbnails.spectrum_png(bias, y)
    assert error.value.argument == argument
