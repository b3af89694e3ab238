"""The dataset pages through the real views: the search (filters by bias, setpoint and
coverage, a query string that round-trips into the form, pages by limit + 1), the upload
(every file's outcome, rows that follow processing, the batch's progress), one dataset (its
numbers, lineage and instrument snapshot, escaped), the correction of its record, and who may
see any of it."""

from __future__ import annotations

import io
import re
from datetime import timedelta

import pytest
from django.test import Client
from django.utils import timezone
from django.utils.html import escape

from labbook.datafiles import actions
from labbook.datafiles.actions import replace_coverages
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.storage import read_stored
from labbook.web.templatetags.labbook_format import format_quantity
from tests.datafiles.test_ingest import grating, npy_bytes

pytestmark = pytest.mark.django_db


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = str(tmp_path / "files")


@pytest.fixture
def t0():
    return (timezone.now() - timedelta(days=1)).replace(second=0, microsecond=0)


def as_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def html(response) -> str:
    return response.content.decode()


def tile_ids(response) -> list[int]:
    """The datasets of the grid, in the order shown."""
    grid = re.search(r'<ul class="ds-grid".*?</ul>', html(response), re.S)
    if grid is None:
        return []
    return [
        int(pk) for pk in re.findall(r'<a class="ds-tile-link" href="/datasets/(\d+)/"', grid[0])
    ]


def section(response, ident: str) -> str:
    match = re.search(rf'<section[^>]*id="{ident}".*?</section>', html(response), re.S)
    assert match, f"no section {ident}"
    return match.group(0)


@pytest.fixture
def ingest(django_capture_on_commit_callbacks):
    """Ingest bytes as the upload does and run the processing queued on commit."""

    def make(data: bytes, name: str, actor, metadata: dict | None = None, instrument=None):
        with django_capture_on_commit_callbacks(execute=True):
            result = actions.ingest(
                io.BytesIO(data), name, metadata=metadata, actor=actor, instrument=instrument
            )
        result.file.refresh_from_db()
        return result.file

    return make


@pytest.fixture
def four_files(ingest, member, t0):
    """Four topographs: (bias V, coverage ML, adsorbate, setpoint A), oldest first."""
    made = []
    for index, (bias, coverage) in enumerate([(-0.5, 0.1), (0.2, 0.5), (1.0, 0.5), (0.3, 2.0)]):
        record = ingest(
            npy_bytes(grating(16, periods=index + 1)),
            f"f{index}.npy",
            member,
            {
                "kind": "topograph",
                "bias_v": bias,
                "setpoint_a": 1e-10 * (index + 1),
                "acquired_at": (t0 + timedelta(minutes=index)).isoformat(),
            },
        )
        assert record.status == "ready", record.error
        # Coverage set by hand, as a sample's preparations would (test_ingest does the same).
        record.coverage_ml = coverage
        record.save()
        replace_coverages(
            record, [{"material": "C60" if index % 2 else "NaCl", "coverage_ml": coverage}]
        )
        made.append(record.pk)
    return made


# --- search -----------------------------------------------------------------------------------


def test_search_filters_by_bias_setpoint_and_coverage(member, four_files):
    client = as_client(member)
    made = four_files
    everything = client.get("/datasets/")
    assert everything.status_code == 200
    assert tile_ids(everything) == made[::-1]  # newest first

    # Units are read: 500 mV is 0.5 V; a bare number is in the unit beside the input (V).
    assert tile_ids(client.get("/datasets/", {"bias_min": "0.1", "bias_max": "500 mV"})) == [
        made[3],
        made[1],
    ]
    assert tile_ids(
        client.get("/datasets/", {"bias_min": "0", "coverage_min": "0.4", "coverage_max": "0.6"})
    ) == [made[2], made[1]]
    assert tile_ids(client.get("/datasets/", {"adsorbate": "C60", "coverage_min": "1 ML"})) == [
        made[3]
    ]
    # A bare setpoint is in pA; an inclusive bound finds the file logged at exactly that value.
    assert tile_ids(client.get("/datasets/", {"setpoint_max": "200"})) == [made[1], made[0]]
    assert tile_ids(client.get("/datasets/", {"setpoint_min": "0.25 nA"})) == [made[3], made[2]]
    assert tile_ids(client.get("/datasets/", {"kind": "spectrum"})) == []
    assert tile_ids(client.get("/datasets/", {"sort": "bias"})) == [
        made[0],
        made[1],
        made[3],
        made[2],
    ]
    assert tile_ids(client.get("/datasets/", {"sort": "oldest"})) == made


def test_the_query_string_round_trips_into_the_form(member, four_files):
    page = as_client(member).get(
        "/datasets/",
        {
            "bias_min": "-1 V",
            "bias_max": "500 mV",
            "coverage_min": "0.4",
            "adsorbate": "C60",
            "q": "f1",
            "sort": "-bias",
        },
    )
    text = html(page)
    assert 'name="bias_min" value="-1 V"' in text
    assert 'name="bias_max" value="500 mV"' in text
    assert 'name="coverage_min" value="0.4"' in text
    assert 'name="q" value="f1"' in text
    assert '<option value="C60" selected>' in text
    assert '<option value="-bias" selected>' in text
    assert 'method="get"' in text  # the URL is the search: bookmarkable, shareable
    assert tile_ids(page) == [four_files[1]]
    assert "filtered by bias from, bias to, coverage from, coverage of" in text


def test_a_chosen_sample_tip_and_instrument_stay_selected_in_few_queries(
    member, manager, instrument, four_files, django_assert_max_num_queries
):
    from labbook.samples.actions import create_sample
    from labbook.tips.actions import create_tip

    samples = [
        create_sample(name=f"Cu(111) #{i}", substrate="Cu(111)", actor=member) for i in (1, 2)
    ]
    tips = [create_tip(name=f"W-{i}", material="W", origin="etched", actor=member) for i in (1, 2)]
    client = as_client(member)
    params = {"sample": samples[1].pk, "tip": tips[0].pk, "instrument": instrument.pk}
    # Session, user, groups; the three selects' options one query each (no count and no
    # cursor per select: 6 more before), the three chosen ids checked, the adsorbates, the
    # page and its coverages.
    with django_assert_max_num_queries(12):
        text = html(client.get("/datasets/", params))
    assert f'<option value="{samples[1].pk}" selected>Cu(111) #2</option>' in text
    assert f'<option value="{samples[0].pk}">Cu(111) #1</option>' in text
    assert f'<option value="{tips[0].pk}" selected>W-1</option>' in text
    assert f'<option value="{instrument.pk}" selected>' in text
    assert '<option value="" >any sample</option>' in text or '<option value="">any sample' in text
    # A chosen id that is not offered is refused beside its field, as before.
    wrong = html(client.get("/datasets/", {"sample": 999999}))
    assert "Select a valid choice" in wrong


def test_pages_go_by_limit_plus_one_and_keep_the_filters(member, four_files, monkeypatch):
    from labbook.datafiles import views

    monkeypatch.setattr(views, "PER_PAGE", 3)
    client = as_client(member)
    first = client.get("/datasets/", {"bias_min": "-2 V"})
    assert tile_ids(first) == four_files[::-1][:3]
    nxt = re.search(r'href="([^"]+)" rel="next"', html(first))[1].replace("&amp;", "&")
    assert "bias_min=-2+V" in nxt and "page=2" in nxt
    assert 'rel="prev"' not in html(first)
    second = client.get(nxt)
    assert tile_ids(second) == [four_files[0]]
    assert 'rel="next"' not in html(second) and 'rel="prev"' in html(second)
    assert "<strong>4–4</strong>" in html(second)


def test_a_search_with_a_wrong_unit_says_so_beside_the_field(member, four_files):
    page = as_client(member).get("/datasets/", {"bias_min": "5 K", "coverage_max": "lots"})
    text = html(page)
    assert page.status_code == 200
    assert tile_ids(page) == []
    assert 'id="id_bias_min-error"' in text and "cannot be converted to V" in text
    assert 'id="id_coverage_max-error"' in text and "cannot read" in text
    assert 'name="bias_min" value="5 K"' in text  # what was typed is kept


def test_the_grid_shows_thumbnails_badges_and_conditions(member, four_files, ingest):
    broken = ingest(b"not a data file", "notes.xyz", member)
    text = html(as_client(member).get("/datasets/"))
    assert f'src="/api/v1/files/{four_files[0]}/thumbnail.png"' in text
    tile = re.search(
        rf'<li class="ds-tile is-unreadable[^"]*">.*?/datasets/{broken.pk}/.*?</li>', text, re.S
    )
    assert tile and "ds-badge-unreadable" in tile[0]
    assert "−0.5\u00a0V" in text and "100\u00a0pA" in text
    assert "0.1\u00a0ML NaCl" in text
    assert "UTC" in text  # times in the lab's zone, the zone named


# --- upload -----------------------------------------------------------------------------------


def _files(*pairs: tuple[bytes, str]) -> list[io.BytesIO]:
    found = []
    for data, name in pairs:
        handle = io.BytesIO(data)
        handle.name = name
        found.append(handle)
    return found


def test_upload_of_a_good_and_an_empty_file_lists_both(
    member, instrument, django_capture_on_commit_callbacks
):
    client = as_client(member)
    good = npy_bytes(grating(64))
    with django_capture_on_commit_callbacks(execute=True):
        response = client.post(
            "/datasets/upload/",
            {
                "files": _files((good, "terrace.npy"), (b"", "empty.npy")),
                "kind": "topograph",
                "instrument": instrument.pk,
                "bias": "-0.5 V",
                "setpoint": "50",
            },
        )
    assert response.status_code == 302 and "batch=" in response["Location"]
    page = client.get(response["Location"])
    text = html(page)

    ready = AcquiredFile.objects.get(original_name="terrace.npy")
    empty = AcquiredFile.objects.get(original_name="empty.npy")
    assert ready.status == "ready" and ready.thumbnail_name
    assert (ready.bias_v, ready.setpoint_a) == (-0.5, pytest.approx(5e-11))
    assert ready.instrument == instrument
    assert empty.status == "unreadable" and "empty" in empty.error.lower()
    assert read_stored(empty.storage_name) == b""  # nothing is lost, not even nothing

    row_ready = re.search(rf'<li[^>]*id="upload-file-{ready.pk}".*?</li>', text, re.S)[0]
    row_empty = re.search(rf'<li[^>]*id="upload-file-{empty.pk}".*?</li>', text, re.S)[0]
    assert f'src="/api/v1/files/{ready.pk}/thumbnail.png"' in row_ready
    assert "ready" in row_ready and ">new<" in row_ready and "hx-get" not in row_ready
    assert "unreadable" in row_empty and escape(empty.error[:30]) in row_empty
    assert "<strong>2 of 2</strong> processed" in text
    assert 'name="csrfmiddlewaretoken"' in text
    thumb = client.get(f"/api/v1/files/{ready.pk}/thumbnail.png")
    assert thumb.status_code == 200 and thumb["Content-Type"] == "image/png"


def test_a_refused_file_never_blocks_the_others(
    member, settings, django_capture_on_commit_callbacks
):
    settings.LABBOOK_MAX_UPLOAD_BYTES = 2000
    client = as_client(member)
    small = npy_bytes(grating(8))
    with django_capture_on_commit_callbacks(execute=True):
        first = client.post(
            "/datasets/upload/",
            {"files": _files((b"x" * 5000, "huge.npy"), (small, "small.npy"))},
        )
    text = html(client.get(first["Location"]))
    assert "huge.npy" in text and "refused" in text and "larger than the limit" in text
    assert AcquiredFile.objects.filter(original_name="small.npy", status="ready").exists()
    assert not AcquiredFile.objects.filter(original_name="huge.npy").exists()
    assert "1 refused" in text

    with django_capture_on_commit_callbacks(execute=True):
        again = client.post("/datasets/upload/", {"files": _files((small, "copy.npy"))})
    assert ">already stored<" in html(client.get(again["Location"]))
    assert AcquiredFile.objects.count() == 1


def test_an_upload_without_files_or_with_a_wrong_unit_is_refused_inline(member):
    client = as_client(member)
    page = client.post("/datasets/upload/", {"bias": "3 kelvin"})
    text = html(page)
    assert page.status_code == 200
    assert "choose one or more files" in text and 'id="id_bias-error"' in text
    assert 'name="bias" value="3 kelvin"' in text
    assert AcquiredFile.objects.count() == 0


def test_rows_poll_while_pending_and_stop_when_ready(member, django_capture_on_commit_callbacks):
    client = as_client(member)
    with django_capture_on_commit_callbacks() as queued:
        response = client.post(
            "/datasets/upload/", {"files": _files((npy_bytes(grating(32)), "slow.npy"))}
        )
    record = AcquiredFile.objects.get()
    batch = response["Location"].split("batch=")[1]
    page = html(client.get(response["Location"]))
    assert "<strong>0 of 1</strong> processed" in page
    assert f'hx-get="/datasets/upload/progress/?batch={batch}' in page

    before = html(client.get(f"/datasets/{record.pk}/row/", {"batch": batch}))
    assert record.status == "pending"
    assert f'hx-get="/datasets/{record.pk}/row/?batch={batch}&amp;polls=1"' in before
    assert 'hx-trigger="every 1s"' in before and "being read" in before
    assert "thumbnail.png" not in before

    for callback in queued:  # the worker's turn
        callback()
    after = html(client.get(f"/datasets/{record.pk}/row/", {"batch": batch, "polls": "1"}))
    assert "hx-trigger" not in after and "hx-get" not in after
    assert "ready" in after and f"/api/v1/files/{record.pk}/thumbnail.png" in after
    assert ">new<" in after  # the outcome is remembered for the batch

    progress = html(client.get("/datasets/upload/progress/", {"batch": batch}))
    assert "<strong>1 of 1</strong> processed" in progress and "hx-trigger" not in progress
    assert 'id="batch-announce" hx-swap-oob="innerHTML"' in progress


def test_a_row_polls_less_often_after_two_minutes(member, django_capture_on_commit_callbacks):
    with django_capture_on_commit_callbacks():
        record = actions.ingest(io.BytesIO(npy_bytes(grating(8))), "w.npy", actor=member).file
    text = html(as_client(member).get(f"/datasets/{record.pk}/row/", {"polls": "500"}))
    assert 'hx-trigger="every 10s"' in text


# --- one dataset ------------------------------------------------------------------------------


@pytest.fixture
def lab(member, manager, instrument, t0):
    """A sample prepared and on the stage, a tip mounted and conditioned, a gauge logging."""
    from labbook.instruments import actions as instruments
    from labbook.instruments.readings import insert_readings
    from labbook.samples import actions as samples
    from labbook.tips import actions as tips

    crystal = samples.create_sample(name="Cu(111) #9", substrate="Cu(111)", actor=member)
    preparation = samples.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=t0 - timedelta(hours=3),
        actor=member,
        steps=[
            {"kind": "anneal", "temperature_k": 780, "duration_s": 600, "cleans": True},
            {"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.25, "duration_s": 240},
        ],
    )
    samples.transfer_sample(
        crystal,
        location="microscope_stage",
        at=t0 - timedelta(hours=2),
        instrument=instrument,
        actor=member,
    )
    first = tips.create_tip(name="W-21", material="W", origin="etched", actor=member)
    second = tips.create_tip(name="PtIr-4", material="PtIr", origin="cut", actor=member)
    tips.mount_tip(first, instrument=instrument, start=t0 - timedelta(days=1), actor=member)
    tips.record_conditioning(
        first,
        kind="field_emission",
        at=t0 - timedelta(hours=20),
        params={"voltage_v": "100 V", "current_a": "2 uA"},
        outcome="sharp again",
        actor=member,
    )
    gauge = instruments.create_channel(
        instrument,
        name="microscope ion gauge",
        quantity="pressure",
        unit="mbar",
        expected_interval_s=60,
        actor=manager,
    )
    insert_readings([(gauge.pk, t0 - timedelta(minutes=3), 3.0e-11)])
    return {
        "sample": crystal,
        "preparation": preparation,
        "tip": first,
        "other_tip": second,
        "gauge": gauge,
    }


@pytest.fixture
def topograph(ingest, member, instrument, lab, t0):
    record = ingest(
        npy_bytes(grating(128)),
        "islands.npy",
        member,
        {
            "kind": "topograph",
            "bias_v": "-0.5 V",
            "setpoint_a": "50 pA",
            "scan_size_m": ["20 nm", "20 nm"],
            "temperature_k": "4.5 K",
            "acquired_at": t0.isoformat(),
            "instrument": instrument.pk,
        },
        instrument=instrument,
    )
    assert record.status == "ready", record.error
    assert (record.sample, record.tip) == (lab["sample"], lab["tip"])
    return record


def test_the_dataset_page_shows_stats_lineage_and_the_instrument_snapshot(
    member, instrument, lab, topograph
):
    page = as_client(member).get(f"/datasets/{topograph.pk}/")
    assert page.status_code == 200
    text = html(page)
    # Facts and the original bytes.
    assert topograph.sha256 in text and "npy/" in text
    assert f'href="/api/v1/files/{topograph.pk}/download"' in text
    assert f'src="/api/v1/files/{topograph.pk}/thumbnail.png"' in text
    # Metadata in the units the trade quotes.
    for shown in ("−0.5\u00a0V", "50\u00a0pA", "20 × 20\u00a0nm", "128 × 128", "4.5\u00a0K"):
        assert shown in text, shown
    # The stored statistics in readable units: heights of a ±0.1 nm grating in pm, its period
    # λ = 20 nm / 8 periods in nm.
    stats = section(page, "statistics")
    rq, ra = (
        format_quantity(topograph.stats["rq"], "m"),
        format_quantity(topograph.stats["ra"], "m"),
    )
    assert "Rq (RMS)" in stats and rq in stats and ra in stats and rq.endswith("pm")
    assert "After line flattening" in stats
    assert format_quantity(topograph.stats["rq_lines"], "m") in stats
    assert "Maximum" in stats and format_quantity(topograph.stats["max"], "m") in stats
    assert format_quantity(topograph.stats["min"], "m").replace("-", "\u2212") in stats
    assert "Dominant period" in stats and "2.5\u00a0nm" in stats
    # Lineage: links to the records, the surface and the tip then.
    lineage = section(page, "lineage")
    assert f'href="/samples/{lab["sample"].pk}/"' in lineage
    assert f'href="/samples/preparations/{lab["preparation"].pk}/"' in lineage
    assert f'href="/tips/{lab["tip"].pk}/"' in lineage
    assert f'href="/instruments/{instrument.pk}/"' in lineage
    assert "on the stage then" in lineage and "in the scanner then" in lineage
    assert "NaCl: 1\u00a0ML (1 ML = one per substrate surface atom)" in lineage
    assert "Field emission" in lineage and "100\u00a0V" in lineage and "sharp again" in lineage
    # The instrument at acquisition: the gauge's value, unit and age then.
    assert "microscope ion gauge" in lineage and "3.0×10⁻¹¹\u00a0mbar" in lineage
    assert "3\u00a0min before" in lineage
    assert "Nothing flagged then" in lineage
    # The exports: the PROV document and the crate of this dataset.
    exports = section(page, "exports")
    assert "PROV-JSON" in exports
    assert f'href="/api/v1/files/{topograph.pk}/provenance.prov.json"' in exports
    assert f'href="/api/v1/files/{topograph.pk}/crate.zip"' in exports


def test_lock_in_and_force_sensor_settings_show_in_their_units(member, ingest):
    record = ingest(
        npy_bytes(grating(32)),
        "df_map.npy",
        member,
        {
            "kind": "other",
            "lockin_amplitude_v": "5 mV",
            "lockin_frequency_hz": "731 Hz",
            "frequency_shift_hz": "-5.2 Hz",
            "oscillation_amplitude_m": "50 pm",
            "sensor_resonance_hz": "30.3 kHz",
        },
    )
    meta = html(as_client(member).get(f"/datasets/{record.pk}/"))
    assert record.metadata.get("frequency_shift_hz") == pytest.approx(-5.2), record.metadata
    for shown in ("Lock-in", "5.00\u00a0mV", "731\u00a0Hz", "Force sensor (nc-AFM)", "Δf"):
        assert shown in meta, shown
    for shown in ("−5.20\u00a0Hz", "50.0\u00a0pm", "30.3\u00a0kHz"):
        assert shown in meta, shown


def test_without_a_scan_size_the_period_is_given_in_pixels(member, ingest):
    record = ingest(npy_bytes(grating(64, periods=8)), "bare.npy", member, {"kind": "topograph"})
    stats = section(as_client(member).get(f"/datasets/{record.pk}/"), "statistics")
    assert "8\u00a0px" in stats and "no scan size" in stats and "nm" not in stats


def test_an_image_that_is_not_heights_shows_its_statistics_in_its_own_unit(member, ingest):
    # A Δf image (kind "other"): a ±2 Hz grating, in the unit the upload gave its channel.
    record = ingest(
        npy_bytes(grating(64, amplitude_m=2.0)),
        "df.npy",
        member,
        {"unit": "Hz", "channel_name": "frequency_shift", "scan_size_m": ["5 nm", "5 nm"]},
    )
    assert (record.status, record.kind, record.stats["unit"]) == ("ready", "other", "Hz")
    stats = section(as_client(member).get(f"/datasets/{record.pk}/"), "statistics")
    # Rq of A·cos is A/√2 = 1.41 Hz (the grating is even about the centre: levelling keeps it).
    assert format_quantity(record.stats["rq"], "Hz") == "1.41\u00a0Hz"
    assert "1.41\u00a0Hz" in stats and format_quantity(record.stats["max"], "Hz") in stats
    assert "pm" not in stats and "nm" in stats  # only the period is a length


def test_an_unreadable_file_shows_its_error_and_keeps_its_bytes(member, ingest):
    record = ingest(b"\x93NUMPY\x01\x00v\x00{'descr'", "cut.npy", member)
    text = html(as_client(member).get(f"/datasets/{record.pk}/"))
    assert record.status == "unreadable"
    assert 'id="file-error"' in text and escape(record.error.split("\n")[0][:40]) in text
    assert "The bytes are kept" in text
    # Never read, so its kind is not known (the column's default "other" is not a fact).
    assert "<dt>Kind</dt><dd>not known</dd>" in text


def test_user_text_is_escaped_on_the_dataset_page(member, instrument, ingest, t0):
    from labbook.samples import actions as samples

    hostile = samples.create_sample(
        name="<script>alert(1)</script>", substrate="Cu(111)", actor=member
    )
    record = ingest(
        npy_bytes(grating(16)),
        "<img src=x onerror=alert(2)>.npy",
        member,
        {"kind": "topograph", "sample": hostile.pk, "acquired_at": t0.isoformat()},
        instrument=instrument,
    )
    assert record.sample == hostile
    client = as_client(member)
    for path in (f"/datasets/{record.pk}/", "/datasets/", f"/datasets/{record.pk}/row/"):
        text = html(client.get(path))
        assert "<script>alert(1)" not in text and "<img src=x" not in text, path
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text, path


def test_correcting_the_tip_resolves_the_lineage_again_and_keeps_both_in_history(
    member, instrument, lab, topograph
):
    client = as_client(member)
    response = client.post(
        f"/datasets/{topograph.pk}/correct/",
        {
            "instrument": instrument.pk,
            "sample": "",
            "tip": lab["other_tip"].pk,
            "acquired_at": timezone.localtime(topograph.acquired_at).strftime("%Y-%m-%dT%H:%M"),
        },
    )
    assert response.status_code == 302 and response["Location"] == f"/datasets/{topograph.pk}/"
    topograph.refresh_from_db()
    assert topograph.tip == lab["other_tip"]
    assert topograph.lineage["tip_state"]["tip"] == lab["other_tip"].pk
    assert topograph.sample == lab["sample"]  # untouched, still from the records

    page = client.get(response["Location"])
    text = html(page)
    assert "tip W-21 → PtIr-4" in text  # the message says what changed
    assert f'href="/tips/{lab["other_tip"].pk}/"' in section(page, "lineage")
    assert "as given with the file" in section(page, "lineage")
    # One history card on the page: the change log's, with the correction and who made it.
    assert 'id="history"' not in text
    history = section(page, "changes")
    assert "by Bo Ferrand" in history
    assert "W-21" in history and "PtIr-4" in history
    assert topograph.history.count() == 3  # came in, processed, corrected


def test_an_unchanged_correction_changes_nothing(member, instrument, lab, topograph):
    client = as_client(member)
    response = client.post(
        f"/datasets/{topograph.pk}/correct/",
        {
            "instrument": instrument.pk,
            "acquired_at": timezone.localtime(topograph.acquired_at).strftime("%Y-%m-%dT%H:%M"),
        },
        follow=True,
    )
    assert "Nothing was changed" in html(response)
    assert topograph.history.count() == 2


def test_a_correction_in_the_future_is_refused_beside_its_field(member, instrument, topograph):
    later = (timezone.now() + timedelta(days=2)).strftime("%Y-%m-%dT%H:%M")
    page = as_client(member).post(
        f"/datasets/{topograph.pk}/correct/",
        {"instrument": instrument.pk, "acquired_at": later},
    )
    assert page.status_code == 200
    assert 'id="id_acquired_at-error"' in html(page) and "later than now" in html(page)
    assert topograph.history.count() == 2


# --- who may see it -----------------------------------------------------------------------------


def test_anonymous_is_sent_to_login_and_an_outsider_is_refused(outsider, member, ingest):
    record = ingest(npy_bytes(grating(8)), "g.npy", member)
    gets = [
        "/datasets/",
        "/datasets/upload/",
        "/datasets/upload/progress/",
        f"/datasets/{record.pk}/",
        f"/datasets/{record.pk}/row/",
    ]
    anonymous = Client()
    for path in gets:
        response = anonymous.get(path)
        assert response.status_code == 302 and response["Location"].startswith("/login/"), path
    posted = anonymous.post(f"/datasets/{record.pk}/correct/", {})
    assert posted.status_code == 302 and posted["Location"].startswith("/login/")
    stranger = as_client(outsider)
    for path in gets:
        assert stranger.get(path).status_code == 403, path
    assert stranger.post(f"/datasets/{record.pk}/correct/", {}).status_code == 403
    assert stranger.post("/datasets/upload/", {"files": _files((b"x", "x.npy"))}).status_code == 403
    assert AcquiredFile.objects.count() == 1
