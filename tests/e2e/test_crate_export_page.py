"""A figure's crate in a real browser: tick two datasets on the search page (one with the
keyboard, one with a click), make a crate, watch its progress reach the end without a reload
while a worker writes it, download the ZIP and find the datasets' own bytes in it."""

from __future__ import annotations

import hashlib
import io
import json
import zipfile
from datetime import timedelta

import numpy as np
import pytest
from django.utils import timezone

from tests.e2e.conftest import IN_CI, services_for_a_worker
from tests.e2e.test_journeys import A11Y_CHECK

pytestmark = pytest.mark.e2e


def npy_bytes(seed: int, n: int = 48) -> bytes:
    rng = np.random.default_rng(seed)
    buffer = io.BytesIO()
    np.save(buffer, (rng.standard_normal((n, n)) * 1e-10).astype(np.float32), allow_pickle=False)
    return buffer.getvalue()


@pytest.fixture
def three_scans(member, instrument):
    """Three topographs of an invented NaCl/Cu(111) run, an hour apart."""
    from django.test import TestCase

    from labbook.datafiles import actions as files

    start = timezone.now() - timedelta(days=1)
    made = []
    for index in range(3):
        with TestCase.captureOnCommitCallbacks(execute=True):
            result = files.ingest(
                io.BytesIO(npy_bytes(index + 10)),
                f"crate-e2e-{index}.npy",
                metadata={
                    "kind": "topograph",
                    "bias_v": "-0.3 V",
                    "setpoint_a": "40 pA",
                    "acquired_at": (start + timedelta(hours=index)).isoformat(),
                },
                actor=member,
                instrument=instrument,
            )
        result.file.refresh_from_db()
        assert result.file.status == "ready", result.file.error
        made.append(result.file)
    return made


def test_a_crate_of_two_ticked_datasets_is_made_followed_and_downloaded(
    page, member, three_scans, signed_in, shot, request, monkeypatch
):
    from labbook.core import jobs
    from labbook.core.models import Job
    from labbook.provenance.export_jobs import CRATE_JOB

    if services_for_a_worker():
        request.getfixturevalue("real_worker")  # the crate is written by a worker process
    elif IN_CI:
        pytest.fail("CI must run the crate test with PostgreSQL and Redis (a real worker)")
    # Hold the wake-up call, as a busy queue would, so that the page is seen waiting first.
    held: list[int] = []
    real_dispatch = jobs.dispatch
    monkeypatch.setattr(jobs, "dispatch", held.append)

    first, _, third = three_scans
    signed_in(member)
    page.goto("/datasets/")
    assert page.locator(".ds-tile").count() == 3

    # The keyboard: Tab from the dataset's link reaches its box; Space ticks it.
    page.get_by_role("link", name=first.original_name).focus()
    page.keyboard.press("Tab")
    box = page.get_by_label(f"Add to crate: {first.original_name}")
    assert page.evaluate("document.activeElement.id") == f"crate-pick-{first.pk}"
    page.keyboard.press("Space")
    assert box.is_checked()
    # A click on the other one's label.
    page.locator(f'label[for="crate-pick-{third.pk}"]').click()
    assert page.get_by_label(f"Add to crate: {third.original_name}").is_checked()
    page.locator("#crate-name").fill("Figure 4: three terraces")
    page.locator("#crate-description").fill("two topographs of the NaCl run")
    shot(page, "ticked")

    page.get_by_role("button", name="Make a crate of the selected datasets").click()
    page.wait_for_url("**/provenance/crates/*/")
    job = Job.objects.get(kind=CRATE_JOB)
    assert job.params["ids"] == [third.pk, first.pk]  # as the grid shows them: newest first
    assert page.locator("h1").inner_text() == "Figure 4: three terraces"
    listed = page.locator(".crate-list li a").all_inner_texts()
    assert listed == [third.original_name, first.original_name]
    progress = page.locator("#crate-progress progress")
    assert progress.get_attribute("max") == "2" and progress.get_attribute("value") == "0"
    assert "waiting for a worker" in page.locator("#crate-progress").inner_text()
    shot(page, "waiting")

    loads: list[str] = []
    page.on("load", lambda: loads.append(page.url))
    assert held == [job.pk]
    monkeypatch.setattr(jobs, "dispatch", real_dispatch)
    real_dispatch(job.pk)  # the worker gets to it (without services: runs here and now)

    link = page.locator("#crate-download")
    link.wait_for(state="visible", timeout=60_000)
    assert progress.get_attribute("value") == "2"
    assert "2 of 2" in page.locator("#crate-progress").inner_text()
    assert page.locator("#crate-announce").inner_text() == "The crate is ready to download."
    assert loads == [], f"the page was reloaded: {loads}"
    job.refresh_from_db()
    assert job.state == Job.State.DONE, job.error
    shot(page, "done")

    with page.expect_download() as info:
        link.click()
    download = info.value
    assert download.suggested_filename == "Figure-4-three-terraces.crate.zip"
    body = download.path().read_bytes()
    assert hashlib.sha256(body).hexdigest() == job.result["sha256"]
    with zipfile.ZipFile(io.BytesIO(body)) as archive:
        names = archive.namelist()
        metadata = json.loads(archive.read("ro-crate-metadata.json"))
        for record in (first, third):
            entry = f"datasets/{record.pk}/{record.original_name}"
            assert hashlib.sha256(archive.read(entry)).hexdigest() == record.sha256
    assert not any(name.startswith(f"datasets/{three_scans[1].pk}/") for name in names)
    root = next(item for item in metadata["@graph"] if item["@id"] == "./")
    assert root["name"] == "Figure 4: three terraces"

    assert page.evaluate(A11Y_CHECK) == []  # the crate page's controls are named


def test_a_crate_of_nothing_is_refused_with_the_reason(page, member, three_scans, signed_in, shot):
    from labbook.core.models import Job

    first = three_scans[0]
    signed_in(member)
    page.goto("/datasets/")
    assert page.evaluate(A11Y_CHECK) == []  # every "Add to crate" box has its label
    page.get_by_role("button", name="Make a crate of the selected datasets").click()
    alert = page.get_by_role("alert")
    assert "no dataset was selected" in alert.inner_text()
    assert Job.objects.count() == 0

    # The crate page alone: the dataset named by the exports card, another typed by number.
    page.goto(f"/provenance/crates/new/?ids={first.pk}")
    assert page.get_by_label(first.original_name).is_checked()
    page.get_by_label("Other datasets by number").fill("12x")
    page.get_by_role("button", name="Make a crate of the selected datasets").click()
    assert "“12x” is not a dataset id" in page.get_by_role("alert").inner_text()
    assert page.get_by_label(first.original_name).is_checked()  # nothing ticked is lost
    assert page.get_by_label("Other datasets by number").input_value() == "12x"
    assert page.evaluate(A11Y_CHECK) == []
    shot(page, "refused")
