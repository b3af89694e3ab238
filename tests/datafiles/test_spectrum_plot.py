"""The spectrum plot of the dataset page: drawn from the stored traces, a PNG of the size the
page's <img> says, cached, for lab members only, 404 for a dataset without traces; and the
page shows it with the normalised conductance's line in the statistics."""

from __future__ import annotations

import io
import re
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser

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
    img = re.search(rf'<img src="/datasets/{spectrum.pk}/spectrum\.png\?v=[^"]+"[^>]*>', page)
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


class _PlotImg(HTMLParser):
    """The spectrum plot's <img> attributes, entities decoded, as a browser reads them."""

    def __init__(self):
        super().__init__()
        self.attrs: dict[str, str] = {}

    def handle_starttag(self, tag, attrs):
        found = dict(attrs)
        if tag == "img" and "/spectrum.png" in (found.get("src") or ""):
            self.attrs = found


def plot_img(client, record) -> dict[str, str]:
    parser = _PlotImg()
    parser.feed(client.get(f"/datasets/{record.pk}/").content.decode())
    assert parser.attrs, "no spectrum plot on the page"
    return parser.attrs


def expected_version(processed_at: datetime) -> str:
    # Microseconds since the Unix epoch, by integer datetime arithmetic (no float, no
    # formatting): what the page's version is made of, after the drawing's style version.
    micro = (processed_at - datetime(1970, 1, 1, tzinfo=UTC)) // timedelta(microseconds=1)
    return f"{spectrum_plots.STYLE_VERSION}-{micro}"


def directives(response) -> set[str]:
    return {part.strip() for part in response["Cache-Control"].split(",")}


def test_the_page_links_a_plot_versioned_by_when_it_was_processed(member, spectrum):
    client = logged_in(member)
    raw = client.get(f"/datasets/{spectrum.pk}/").content.decode()
    img = plot_img(client, spectrum)
    src = f"/datasets/{spectrum.pk}/spectrum.png?v={expected_version(spectrum.processed_at)}"
    assert img["src"] == src
    # Two query parameters in an HTML attribute: the '&' written as "&amp;" (HTML's named
    # character references), which the parser reads back as '&'.
    assert img["srcset"] == f"{src} 1x, {src}&scale=2 2x"
    assert f"{src}&amp;scale=2 2x" in raw

    # Processed again (a new processed_at with the new stats): the page links a new URL.
    later = spectrum.processed_at + timedelta(seconds=90, microseconds=1)
    type(spectrum).objects.filter(pk=spectrum.pk).update(processed_at=later)
    again = plot_img(client, spectrum)
    assert again["src"] == f"/datasets/{spectrum.pk}/spectrum.png?v={expected_version(later)}"
    assert again["src"] != img["src"]


def test_the_current_version_is_kept_long_any_other_url_an_hour(member, spectrum):
    client = logged_in(member)
    src = plot_img(client, spectrum)["src"]
    versioned = client.get(src)
    assert versioned.status_code == 200 and versioned["Content-Type"] == "image/png"
    # RFC 8246: "immutable" says the URL's content will not change; a year's max-age.
    assert directives(versioned) == {"private", "max-age=31536000", "immutable"}
    assert png_size(versioned.content) == (spectrum_plots.WIDTH_PX, spectrum_plots.HEIGHT_PX)
    double = client.get(f"{src}&scale=2")
    assert double.status_code == 200 and "immutable" in directives(double)
    assert png_size(double.content) == (2 * spectrum_plots.WIDTH_PX, 2 * spectrum_plots.HEIGHT_PX)

    unversioned = client.get(f"/datasets/{spectrum.pk}/spectrum.png")
    assert unversioned.status_code == 200 and unversioned["Content-Type"] == "image/png"
    assert directives(unversioned) == {"private", "max-age=3600"}
    assert unversioned.content == versioned.content

    # After processing again, the old page's URL still answers, but only for an hour: it
    # now shows other traces than when it was linked.
    later = spectrum.processed_at + timedelta(seconds=90)
    type(spectrum).objects.filter(pk=spectrum.pk).update(processed_at=later)
    stale = client.get(src)
    assert stale.status_code == 200 and stale["Content-Type"] == "image/png"
    assert directives(stale) == {"private", "max-age=3600"}
    wrong = client.get(f"/datasets/{spectrum.pk}/spectrum.png?v=nonsense")
    assert wrong.status_code == 200 and directives(wrong) == {"private", "max-age=3600"}


def test_si_prefix_of_the_axes():
    assert spectrum_plots.si_scale(np.array([2e-9, -7e-9])) == (1e9, "n")
    assert spectrum_plots.si_scale(np.array([np.nan, 3e-12])) == (1e12, "p")
    assert spectrum_plots.si_scale(np.array([5e-4])) == (pytest.approx(1e6), "µ")
    assert spectrum_plots.si_scale(np.array([np.nan])) == (1.0, "")
