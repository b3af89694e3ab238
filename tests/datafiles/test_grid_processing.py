"""Grids of spectra get a conductance map (thumbnail, statistics) and a mean spectrum; a
spectrum's onset comes from its lock-in dI/dV where the file has one."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from django.core.files.storage import default_storage
from django.test import Client
from PIL import Image
from scipy.signal import savgol_filter

from labbook.accounts.actions import mint_token
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.processing import analyse
from labbook.datafiles.readers import read_file
from labbook.science import spectra

BIAS = np.linspace(-1.0, 1.0, 101)  # 20 mV steps; −0.44 V and +0.30 V are sample points
STEP = BIAS[1] - BIAS[0]


def npz_bytes(**arrays: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def kinked_current(v0: float = -0.44, below: float = 1e-9, above: float = 3e-9) -> np.ndarray:
    """I(V) of two straight lines meeting at v0: dI/dV steps from ``below`` to ``above`` there.

    The Savitzky–Golay derivative of |V − v0| sampled symmetrically about v0 is odd about v0,
    so the derivative of this I(V) crosses the middle of its step exactly at v0 (analytic)."""
    return below * BIAS + (above - below) * np.maximum(BIAS - v0, 0.0)


def parse(arrays: dict[str, np.ndarray], units: dict[str, str], name: str = "f.npz"):
    return read_file(name, npz_bytes(**arrays), metadata={"units": units})


@pytest.fixture
def upload(member, settings, tmp_path, django_capture_on_commit_callbacks):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    client = Client()

    def send(data: bytes, name: str, metadata: dict):
        body = {"file": io.BytesIO(data), "metadata": json.dumps(metadata)}
        body["file"].name = name
        with django_capture_on_commit_callbacks(execute=True):
            return client.post("/api/v1/files", body, headers={"Authorization": f"Bearer {raw}"})

    return send


@pytest.mark.django_db
def test_a_current_grid_is_ready_with_a_conductance_map_and_its_thumbnail(upload):
    rng = np.random.default_rng(5)
    gain = 0.5 + rng.random((12, 16, 1))  # a different junction conductance at each pixel
    current = kinked_current()[None, None, :] * gain
    response = upload(
        npz_bytes(bias=BIAS, current=current),
        "grid.npz",
        {"kind": "grid", "units": {"bias": "V", "current": "A"}},
    )
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.status == "ready", record.error
    stats = record.stats
    assert (stats["map"], stats["map_source"], stats["unit"]) == (
        "mean dI/dV over bias",
        "numerical",
        "S",
    )
    # Independent check: scipy's Savitzky–Golay derivative (mode "interp", the window and
    # order processing uses) of every spectrum, then numpy's mean over the bias axis.
    expected = savgol_filter(current, 21, 3, deriv=1, delta=STEP, mode="interp").mean(axis=-1)
    assert stats["mean"] == pytest.approx(expected.mean(), rel=1e-9)
    assert stats["std"] == pytest.approx(expected.std(), rel=1e-9)
    assert stats["min"] == pytest.approx(expected.min(), rel=1e-9)
    assert stats["max"] == pytest.approx(expected.max(), rel=1e-9)
    assert stats["map_pixels"] == [16, 12] and stats["map_nan_pixels"] == 0
    # The mean spectrum is measured like a single one: its onset is the kink of I(V).
    assert stats["didv_source"] == "numerical"
    assert stats["onset_v"] == pytest.approx(-0.44, abs=1e-6)
    mean_didv = savgol_filter(current.mean(axis=(0, 1)), 21, 3, deriv=1, delta=STEP)
    assert stats["didv_max_a_per_v"] == pytest.approx(mean_didv.max(), rel=1e-9)
    with default_storage.open(record.thumbnail_name) as handle:
        picture = Image.open(io.BytesIO(handle.read()))
        picture.load()
    assert picture.format == "PNG"
    assert picture.size == (256, 192)  # longest side 256, the map's 16 : 12 kept


def test_a_grid_with_a_lockin_channel_maps_the_lockin_and_keeps_nan_pixels_out():
    rng = np.random.default_rng(11)
    lockin = rng.normal(2e-9, 3e-10, (8, 10, 101))
    lockin[..., BIAS >= 0.3] += 4e-9  # a band edge at +0.30 V in every spectrum
    lockin[3, 4, 50] = np.nan  # one incomplete spectrum
    current = np.broadcast_to(kinked_current(), lockin.shape).copy()
    parsed = parse(
        {"bias": BIAS, "current": current, "didv": lockin},
        {"bias": "V", "current": "A", "didv": "nS"},
    )
    lockin_si = lockin * 1e-9
    stats = analyse(parsed, {}).stats
    assert (stats["map_source"], stats["channel"], stats["unit"]) == ("lock-in", "didv", "S")
    expected = lockin_si.mean(axis=-1)  # numpy: NaN in the one incomplete pixel
    finite = expected[np.isfinite(expected)]
    assert stats["map_nan_pixels"] == 1 and finite.size == 79
    assert stats["mean"] == pytest.approx(finite.mean(), rel=1e-9)
    assert stats["std"] == pytest.approx(finite.std(), rel=1e-9)
    assert (stats["min"], stats["max"]) == (
        pytest.approx(finite.min(), rel=1e-9),
        pytest.approx(finite.max(), rel=1e-9),
    )
    # The mean spectrum's onset is the lock-in's band edge, not the kink of I(V) at −0.44 V.
    assert stats["didv_source"] == "lock-in" and stats["didv_channel"] == "didv"
    assert stats["onset_v"] == pytest.approx(0.29, abs=0.011)


def test_a_spectrum_onset_comes_from_its_lockin_channel_when_there_is_one():
    current = kinked_current()  # numerical dI/dV steps at −0.44 V
    lockin = np.where(BIAS >= 0.3, 1.5, 0.5)  # lock-in output in volts, its step at +0.30 V
    parsed = parse(
        {"bias": BIAS, "current": current, "lockin_x": lockin, "lockin_y": 0.0 * lockin},
        {"bias": "V", "current": "A", "lockin_x": "V", "lockin_y": "V"},
    )
    stats = analyse(parsed, {}).stats
    assert stats["didv_source"] == "lock-in" and stats["didv_channel"] == "lockin_x"
    # The half-height of a step between two samples is their midpoint (linear interpolation);
    # the Savitzky–Golay smoothing is symmetric, so it stays there.
    assert stats["onset_v"] == pytest.approx(0.29, abs=1e-6)
    # The volts are put on the numerical dI/dV's scale: a positive least-squares factor.
    assert stats["didv_lockin_scale"] > 0
    alone = analyse(
        parse({"bias": BIAS, "current": current}, {"bias": "V", "current": "A"}), {}
    ).stats
    assert alone["didv_source"] == "numerical" and "didv_channel" not in alone
    assert alone["onset_v"] == pytest.approx(-0.44, abs=1e-6)


def test_a_lockin_with_its_phase_180_degrees_off_still_gives_the_rising_onset():
    current = kinked_current(v0=-0.2)
    lockin = -np.where(BIAS >= -0.2, 3.0, 1.0)  # the numerical dI/dV, sign flipped, in volts
    parsed = parse(
        {"bias": BIAS, "current": current, "lockin_x": lockin},
        {"bias": "V", "current": "A", "lockin_x": "V"},
    )
    stats = analyse(parsed, {}).stats
    assert stats["didv_lockin_scale"] < 0
    assert stats["onset_v"] == pytest.approx(-0.21, abs=1e-6)
    assert stats["didv_max_a_per_v"] == pytest.approx(3e-9, rel=0.05)


def test_a_lockin_in_siemens_is_used_as_measured():
    current = kinked_current()
    lockin = np.where(BIAS >= 0.3, 5.0, 1.0)  # nS
    parsed = parse(
        {"bias": BIAS, "current": current, "didv": lockin},
        {"bias": "V", "current": "A", "didv": "nS"},
    )
    stats = analyse(parsed, {}).stats
    assert stats["didv_source"] == "lock-in" and "didv_lockin_scale" not in stats
    assert stats["didv_max_a_per_v"] == pytest.approx(5e-9)
    assert stats["onset_v"] == pytest.approx(0.29, abs=1e-6)


@pytest.mark.parametrize(("points", "window", "descending"), [(101, 21, False), (37, 7, True)])
def test_mean_didv_weights_give_the_mean_of_the_savgol_derivative(points, window, descending):
    rng = np.random.default_rng(points)
    bias = np.linspace(1.5, -0.5, points) if descending else np.linspace(-0.5, 1.5, points)
    spectra_ = rng.normal(size=(3, 4, points))
    step = (bias[-1] - bias[0]) / (points - 1)
    # scipy.signal.savgol_filter (mode "interp") as the independent derivative.
    expected = savgol_filter(spectra_, window, 3, deriv=1, delta=step, mode="interp").mean(-1)
    weights = spectra.mean_didv_weights(bias, window=window, order=3)
    np.testing.assert_allclose(spectra_ @ weights, expected, rtol=1e-9, atol=1e-12)


def test_a_second_harmonic_lockin_is_not_taken_for_didv():
    current = kinked_current()
    lockin = np.where(BIAS >= 0.3, 1.5, 0.5)
    buffer = npz_bytes(bias=BIAS, current=current, lockin_x=lockin)
    parsed = read_file(
        "h2.npz",
        buffer,
        metadata={
            "units": {"bias": "V", "current": "A", "lockin_x": "V"},
            "lockin_harmonic": 2,
        },
    )
    assert parsed.metadata["lockin_harmonic"] == 2
    stats = analyse(parsed, {}).stats
    assert stats["didv_source"] == "numerical"
    assert stats["onset_v"] == pytest.approx(-0.44, abs=1e-6)
