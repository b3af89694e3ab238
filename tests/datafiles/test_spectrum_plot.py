"""The spectrum plot of the dataset page: drawn from the stored traces, a PNG of the size the
page's <img> says, cached, for lab members only, 404 for a dataset without traces; and the
page shows it with the normalised conductance's line in the statistics."""

from __future__ import annotations

import io
import re

import numpy as np
import pytest
from django.core.cache import cache
from django.test import Client
from PIL import Image

from labbook.datafiles import actions, spectrum_plots
from tests.datafiles.test_ingest import grating, npy_bytes

pytestmark = pytest.mark.django_db

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification (ISO/IEC 15948), section 5.2
BIAS = np.linspace(-1.0, 1.0, 800)


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = str(tmp_path / "files")


@pytest.fixture(autouse=True)
def _fresh_cache():
    cache.clear()
    yield
    cache.clear()


def npz_bytes(**arrays: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


@pytest.fixture
def ingest(django_capture_on_commit_callbacks):
    def make(data: bytes, name: str, actor, metadata: dict | None = None):
        with django_capture_on_commit_callbacks(execute=True):
            result = actions.ingest(io.BytesIO(data), name, metadata=metadata, actor=actor)
        result.file.refresh_from_db()
        assert result.file.status == "ready", result.file.error
        return result.file

    return make


@pytest.fixture
def spectrum(ingest, member):
    current = 1e-9 * BIAS + 2e-9 * BIAS**3
    return ingest(
        npz_bytes(bias=BIAS, current=current),
        "cubic.npz",
        member,
        {"units": {"bias": "V", "current": "A"}},
    )


def logged_in(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def png_size(content: bytes) -> tuple[int, int]:
    assert content[:8] == PNG_SIGNATURE
    with Image.open(io.BytesIO(content)) as picture:
        picture.verify()
    with Image.open(io.BytesIO(content)) as picture:
        return picture.size


def test_the_plot_is_a_png_of_the_size_the_page_gives(member, spectrum):
    client = logged_in(member)
    response = client.get(f"/datasets/{spectrum.pk}/spectrum.png")
    assert response.status_code == 200
    assert response["Content-Type"] == "image/png"
    assert "private" in response["Cache-Control"]
    assert png_size(response.content) == (spectrum_plots.WIDTH_PX, spectrum_plots.HEIGHT_PX)
    double = client.get(f"/datasets/{spectrum.pk}/spectrum.png?scale=2")
    assert png_size(double.content) == (2 * spectrum_plots.WIDTH_PX, 2 * spectrum_plots.HEIGHT_PX)
    assert client.get(f"/datasets/{spectrum.pk}/spectrum.png?scale=9").status_code == 400


def test_the_plot_draws_the_stored_traces_not_a_blank_frame(member, spectrum):
    png = logged_in(member).get(f"/datasets/{spectrum.pk}/spectrum.png").content
    with Image.open(io.BytesIO(png)) as picture:
        rgb = np.asarray(picture.convert("RGB"), dtype=int)
    accent = tuple(int(spectrum_plots.web_plots.ACCENT[i : i + 2], 16) for i in (1, 3, 5))
    near = np.abs(rgb - np.array(accent)).sum(axis=-1) < 60
    height = rgb.shape[0]
    # The copper curves are drawn in both panels: dI/dV above, the normalised conductance below.
    assert near[: height // 2].sum() > 200
    assert near[height // 2 :].sum() > 200


def test_the_plot_is_cached_under_the_file_and_its_traces(member, spectrum, monkeypatch):
    client = logged_in(member)
    first = client.get(f"/datasets/{spectrum.pk}/spectrum.png").content
    key = spectrum_plots.spectrum_cache_key(
        spectrum.sha256, spectrum.stats["traces"], spectrum.stats["norm_conductance_epsilon_v"], 1
    )
    assert spectrum.sha256 in key and cache.get(key) == first

    def no_drawing(*args, **kwargs):
        raise AssertionError("drawn again although cached")

    monkeypatch.setattr(spectrum_plots, "render_spectrum_figure", no_drawing)
    assert client.get(f"/datasets/{spectrum.pk}/spectrum.png").content == first
    # Other traces (the file processed again) are another key.
    other = dict(spectrum.stats["traces"], norm_conductance=None)
    assert spectrum_plots.spectrum_cache_key(spectrum.sha256, other, 0.2, 1) != key


def test_the_plot_needs_a_lab_member(member, outsider, spectrum):
    url = f"/datasets/{spectrum.pk}/spectrum.png"
    anonymous = Client().get(url)
    assert anonymous.status_code == 302 and anonymous["Location"].startswith("/login/?next=")
    assert logged_in(outsider).get(url).status_code == 403
    assert logged_in(member).post(url).status_code == 405


def test_a_dataset_without_traces_has_no_plot(member, ingest):
    topograph = ingest(npy_bytes(grating(32)), "islands.npy", member, {"kind": "topograph"})
    assert "traces" not in topograph.stats
    client = logged_in(member)
    assert client.get(f"/datasets/{topograph.pk}/spectrum.png").status_code == 404
    assert client.get("/datasets/999999/spectrum.png").status_code == 404
    page = client.get(f"/datasets/{topograph.pk}/").content.decode()
    assert "spectrum.png" not in page


def test_the_page_shows_the_plot_and_the_normalised_conductance(member, spectrum):
    page = logged_in(member).get(f"/datasets/{spectrum.pk}/").content.decode()
    img = re.search(rf'<img src="/datasets/{spectrum.pk}/spectrum\.png"[^>]*>', page)
    assert img, "no spectrum plot on the page"
    assert 'width="640"' in img[0] and 'height="440"' in img[0]
    assert "normalised conductance (dI/dV)/(I/V)" in img[0] and "alt=" in img[0]
    stats = re.search(r'<section[^>]*id="statistics".*?</section>', page, re.S)[0]
    line = re.search(r"<dt>Normalised conductance \(dI/dV\)/\(I/V\)</dt><dd>(.*?)</dd>", stats)
    assert line, "no normalised conductance line"
    low = spectrum.stats["norm_conductance_min"]
    assert f"{low:.3g}" in line[1]
    assert "ε = 200\xa0mV" in line[1]


def test_a_spectrum_without_current_shows_why_there_is_no_ratio(member, ingest):
    lockin = 1e-3 * (1.0 + np.tanh((BIAS + 0.44) / 0.02))
    record = ingest(
        npz_bytes(bias=BIAS, lockin_x=lockin),
        "lockin.npz",
        member,
        {"units": {"bias": "V", "lockin_x": "V"}},
    )
    client = logged_in(member)
    page = client.get(f"/datasets/{record.pk}/").content.decode()
    assert re.search(
        r"<dt>Normalised conductance \(dI/dV\)/\(I/V\)</dt><dd>—.*?no current channel", page
    )
    # Its lock-in trace is still drawn, in its own unit.
    response = client.get(f"/datasets/{record.pk}/spectrum.png")
    assert response.status_code == 200 and response.content[:8] == PNG_SIGNATURE


def test_si_prefix_of_the_axes():
    assert spectrum_plots.si_scale(np.array([2e-9, -7e-9])) == (1e9, "n")
    assert spectrum_plots.si_scale(np.array([np.nan, 3e-12])) == (1e12, "p")
    assert spectrum_plots.si_scale(np.array([5e-4])) == (pytest.approx(1e6), "µ")
    assert spectrum_plots.si_scale(np.array([np.nan])) == (1.0, "")
