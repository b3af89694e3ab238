"""The lab's jobs, done in a real browser: log in, log a preparation from a recipe with the
keyboard alone, upload a file and watch its preview arrive, search by bias and coverage, open a
dataset's provenance and download its PROV document, read the refill plan, write a note with
markup in it. Each test leaves its screenshots in var/e2e/."""

from __future__ import annotations

import io
import json
import re
from datetime import timedelta

import numpy as np
import pytest
from django.utils import timezone

from tests.e2e.conftest import IN_CI, PHONE, services_for_a_worker

pytestmark = pytest.mark.e2e


def npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=False)
    return buffer.getvalue()


def grating(n: int = 64, amplitude_m: float = 1e-10, periods: int = 4) -> np.ndarray:
    x = (np.arange(n) - (n - 1) / 2) / n
    return np.tile(amplitude_m * np.cos(2 * np.pi * periods * x), (n, 1)).astype(np.float32)


# An image that has arrived and decoded to a real picture (a broken one has no natural width).
LOADED = """img => img.decode().then(() => {
  if (!img.naturalWidth) throw new Error("the image did not load: " + img.src);
})"""


@pytest.fixture
def crystal(member):
    from labbook.samples import actions

    return actions.create_sample(name="Cu(111) #E2", substrate="Cu(111)", actor=member)


@pytest.fixture
def recipe(member):
    from labbook.samples import actions

    return actions.create_recipe(
        name="Cu(111) clean",
        substrate="Cu(111)",
        steps=[
            {
                "kind": "sputter",
                "gas": "Ar",
                "energy_ev": 1000,
                "current_a": 5e-6,
                "beam_area_cm2": 1.0,
                "pressure_mbar": 5e-6,
                "duration_s": 900,
            },
            {"kind": "anneal", "temperature_k": 800, "duration_s": 600, "cleans": True},
        ],
        actor=member,
    )


def test_log_in_through_the_form(page, member, instrument, login_as, shot, live_server):
    page.goto("/")
    page.wait_for_url("**/login/**")  # every page needs a login
    assert page.evaluate("document.activeElement.id") == "id_username"
    shot(page, "form")
    page.get_by_label("Username").fill("bo")
    page.get_by_label("Password").fill("not the password")
    page.get_by_role("button", name="Log in").click()
    assert page.get_by_role("alert").inner_text().startswith("The username and password")
    shot(page, "refused")

    login_as(page, member)
    assert page.get_by_role("heading", level=1).inner_text() == "Dashboard"
    assert "Bo Ferrand" in page.locator(".account").inner_text()
    assert page.get_by_role("heading", name="LTM-T").is_visible()
    shot(page, "dashboard")
    page.set_viewport_size(PHONE)
    shot(page, "dashboard")


def test_a_preparation_from_a_recipe_takes_two_keystrokes(
    page, member, instrument, crystal, recipe, signed_in, shot
):
    from labbook.samples.models import Preparation

    signed_in(member)
    # Arriving from the sample's page: the only instrument and this sample are chosen, the
    # focus waits on the first way to start (the recipe for this surface).
    page.goto(f"/samples/log/?sample={crystal.pk}")
    assert page.locator("#id_instrument").input_value() == str(instrument.pk)
    assert page.locator("#id_sample").input_value() == str(crystal.pk)
    assert page.evaluate("document.activeElement.id") == f"start-recipe-{recipe.pk}"
    shot(page, "ready")

    page.keyboard.press("Space")  # 1: take the recipe (its steps arrive by htmx)
    page.keyboard.press("Enter")  # 2: save, once the steps are on the page (log.js waits)
    page.wait_for_url("**/samples/preparations/*/")

    preparation = Preparation.objects.get()
    assert (preparation.sample, preparation.instrument, preparation.recipe) == (
        crystal,
        instrument,
        recipe,
    )
    assert preparation.operator == member
    steps = list(preparation.steps.order_by("position"))
    assert [s.kind for s in steps] == ["sputter", "anneal"]
    # Fluence = I·t / (e·A): 5 µA × 900 s / (1.602176634e-19 C × 1 cm²) = 2.81×10¹⁶ ions/cm²
    # (e from CODATA 2018, exact in the SI).
    assert steps[0].fluence_per_cm2 == pytest.approx(5e-6 * 900 / 1.602176634e-19, rel=1e-6)
    assert page.get_by_role("heading", level=1).is_visible()
    assert "Cu(111) clean" in page.content()
    shot(page, "saved")


def test_an_uploaded_file_shows_its_preview_without_a_reload(
    page, member, instrument, signed_in, shot, request, monkeypatch, tmp_path
):
    from labbook.datafiles.models import AcquiredFile
    from labbook.datafiles.tasks import process_file

    held: list[int] = []
    if services_for_a_worker():
        request.getfixturevalue("real_worker")  # the upload is read by a worker process
    elif IN_CI:
        pytest.fail("CI must run the upload test with PostgreSQL and Redis (a real worker)")
    else:
        # No broker here, so tasks would run inside the upload request and the row would come
        # back ready. Hold the message instead, as a busy worker would, and let it run once
        # the page shows the row waiting.
        monkeypatch.setattr(process_file, "delay", lambda file_id, *a, **k: held.append(file_id))

    signed_in(member)
    page.goto("/datasets/upload/")
    upload = tmp_path / "e2e-grating.npy"
    upload.write_bytes(npy_bytes(grating()))
    page.locator("#id_files").set_input_files(str(upload))
    page.locator("#id_kind").select_option("topograph")
    page.get_by_role("button", name="Upload").click()
    page.wait_for_url("**/datasets/upload/?**")
    record = AcquiredFile.objects.get()
    row = page.locator(f"#upload-file-{record.pk}")
    assert row.is_visible()

    loads: list[str] = []
    page.on("load", lambda: loads.append(page.url))
    if held:
        assert "being read" in row.inner_text()
        assert row.locator("img").count() == 0
        shot(page, "pending")
        from labbook.celery import app

        assert held == [record.pk] and app.conf.task_always_eager
        monkeypatch.undo()
        process_file.delay(record.pk)  # the worker gets to it (eager: runs here and now)

    thumbnail = page.locator(f"#upload-file-{record.pk} img")
    thumbnail.wait_for(state="visible", timeout=60_000)
    record.refresh_from_db()
    assert record.status == "ready", record.error
    thumbnail.evaluate(LOADED)  # the PNG itself arrives and decodes
    assert "ready" in page.locator(f"#upload-file-{record.pk}").inner_text()
    assert loads == [], f"the page was reloaded: {loads}"
    shot(page, "ready")


@pytest.fixture
def cold_lab(instrument, manager):
    """A 12 L helium bath of the instrument with two weeks of its level logged, ending now
    (the cryo tests' synthetic log: 3 L/day, refilled every 2.5 days)."""
    from labbook.cryo import actions
    from labbook.demo.instruments import insert_readings
    from labbook.instruments.actions import create_channel
    from tests.cryo.conftest import synthetic_level

    level = create_channel(
        instrument,
        name="LHe bath level",
        quantity="cryogen_level",
        unit="%",
        actor=manager,
        expected_interval_s=1800,
    )
    cryostat = actions.create_cryostat(
        instrument,
        level_channel=level,
        actor=manager,
        name="LHe bath",
        cryogen="LHe",
        capacity_l=12.0,
        minimum_l=1.5,
        price_per_l=14.0,
        room_volume_m3=60.0,
        transfer_dewar_l=100.0,
    )
    t, percent, _ = synthetic_level(now=timezone.now())
    insert_readings(level.pk, t, percent)
    return cryostat


@pytest.fixture
def datasets(member, manager, instrument):
    """Two preparations of one crystal, each followed by a topograph: 0.25 and 1 ML of NaCl
    (rate × time: 0.25 ML/min for 60 s and 240 s), taken at −0.5 V and +1.2 V."""
    from django.test import TestCase

    from labbook.datafiles import actions as files
    from labbook.samples import actions as samples

    crystal = samples.create_sample(name="Cu(111) #S", substrate="Cu(111)", actor=member)
    start = timezone.now() - timedelta(days=2)
    made = []
    for index, (seconds, bias) in enumerate([(60, "-0.5 V"), (240, "1.2 V")]):
        at = start + timedelta(hours=6 * index)
        samples.record_preparation(
            sample=crystal,
            instrument=instrument,
            started_at=at,
            actor=member,
            steps=[
                {"kind": "anneal", "temperature_k": 780, "duration_s": 600, "cleans": True},
                {
                    "kind": "deposit",
                    "material": "NaCl",
                    "rate_ml_per_min": 0.25,
                    "duration_s": seconds,
                },
            ],
        )
        samples.transfer_sample(
            crystal,
            location="microscope_stage",
            at=at + timedelta(hours=1),
            instrument=instrument,
            actor=member,
        )
        with TestCase.captureOnCommitCallbacks(execute=True):
            result = files.ingest(
                io.BytesIO(npy_bytes(grating(periods=index + 2))),
                f"nacl-{index}.npy",
                metadata={
                    "kind": "topograph",
                    "bias_v": bias,
                    "setpoint_a": "50 pA",
                    "acquired_at": (at + timedelta(hours=2)).isoformat(),
                },
                actor=member,
                instrument=instrument,
            )
        result.file.refresh_from_db()
        assert result.file.status == "ready", result.file.error
        assert result.file.sample == crystal
        made.append(result.file)
    return made


def test_search_by_bias_and_coverage(page, member, datasets, signed_in, shot):
    low, high = datasets
    assert low.coverage_ml == pytest.approx(0.25) and high.coverage_ml == pytest.approx(1.0)
    signed_in(member)
    page.goto("/datasets/")
    assert page.locator(".ds-tile").count() == 2
    shot(page, "all")

    page.locator("#id_bias_min").fill("0.5 V")
    page.locator("#id_coverage_min").fill("0.5")
    page.locator("#id_coverage_max").fill("2 ML")
    page.locator("#id_coverage_max").press("Enter")
    page.wait_for_url("**/datasets/?**")
    tiles = page.locator(".ds-tile")
    assert tiles.count() == 1
    assert tiles.first.locator(".ds-name").inner_text() == "nacl-1.npy"
    assert "bias_min=0.5" in page.url and "coverage_min=0.5" in page.url
    # The thumbnails in the grid are real images served by the app.
    tiles.first.locator("img").evaluate(LOADED)
    shot(page, "filtered")

    page.locator("#id_bias_min").fill("-1 V")
    page.locator("#id_bias_max").fill("0 V")
    page.locator("#id_coverage_min").fill("")
    page.locator("#id_coverage_max").fill("0.3")
    page.get_by_role("button", name="Search").click()
    page.wait_for_url("**bias_max=0**")
    assert [t.inner_text() for t in page.locator(".ds-tile .ds-name").all()] == ["nacl-0.npy"]

    page.locator("#id_bias_min").fill("5 parsecs")
    page.get_by_role("button", name="Search").click()
    assert "bias" in page.get_by_role("alert").inner_text().lower()
    assert page.locator("#id_bias_min").get_attribute("aria-invalid") == "true"


def test_the_provenance_opens_and_its_prov_document_downloads(
    page, member, datasets, signed_in, shot
):
    dataset = datasets[1]
    signed_in(member)
    page.goto("/datasets/")
    page.get_by_role("link", name="nacl-1.npy").click()
    page.wait_for_url(f"**/datasets/{dataset.pk}/")
    assert dataset.sha256 in page.content()
    shot(page, "dataset")

    link = page.locator('a[href$="provenance.prov.json"]').first
    assert link.count() == 1, "no link to the PROV document on the dataset page"
    link.scroll_into_view_if_needed()
    shot(page, "provenance")
    with page.expect_download() as info:
        link.click()
    download = info.value
    document = json.loads(download.path().read_text(encoding="utf-8"))
    # W3C PROV-JSON (https://www.w3.org/submissions/prov-json/): entities, activities, agents
    # and the relations between them, keyed by qualified names.
    assert {"entity", "activity", "agent"} <= set(document)
    assert "wasGeneratedBy" in document or "wasDerivedFrom" in document
    text = json.dumps(document)
    assert dataset.sha256 in text and "Cu(111) #S" in text


def test_the_refill_plan(page, manager, cold_lab, signed_in, shot):
    from labbook.cryo.models import Cryostat

    signed_in(manager)
    response = page.goto("/cryostats/")
    assert response.status == 200, "the cryogen planner is not served at /cryostats/"
    assert page.get_by_role("heading", level=1).inner_text() == "Cryogen planner"
    plan = page.locator("#plan")
    assert "Refill plan" in plan.locator("h2").inner_text()
    # Two weeks logged at 3 L/day from a 12 L bath: the next refills are on the plan.
    rows = plan.locator("tbody tr")
    assert rows.count() >= 1
    assert Cryostat.objects.get().name in rows.first.inner_text()
    assert "L" in rows.first.locator("td[data-label=Transfer]").inner_text()
    shot(page, "planner")
    page.set_viewport_size(PHONE)
    page.wait_for_timeout(100)
    assert page.evaluate("document.documentElement.scrollWidth <= window.innerWidth")
    shot(page, "planner")


def test_a_note_with_a_script_tag_is_shown_as_text(page, member, instrument, signed_in, shot):
    from labbook.logbook.models import Note

    signed_in(member)
    page.goto(f"/logbook/{instrument.pk}/")
    page.locator("main").click(position={"x": 5, "y": 5})  # the page has focus, not a field
    page.keyboard.press("n")
    dialog = page.get_by_role("dialog")
    dialog.wait_for(state="visible")
    note = page.locator("#note-dialog textarea")
    assert page.evaluate("document.activeElement.tagName") == "TEXTAREA"
    alerts: list[str] = []
    page.on("dialog", lambda d: (alerts.append(d.message), d.dismiss()))
    typed = '<script>alert("owned")</script> **CO** dosed at <b>5 K</b> & 2 L'
    note.fill(typed)
    page.keyboard.press("Control+Enter")
    dialog.wait_for(state="hidden")
    assert page.locator("#note-status").inner_text().startswith("Note added")
    assert Note.objects.get().text == typed

    page.reload()
    shown = page.locator(".note-text", has_text="owned").first
    assert shown.inner_text().strip() == typed  # the markup is shown as typed, not run
    assert page.locator(".note-text script, .note-text b").count() == 0
    assert alerts == []
    shot(page, "logbook")


def test_every_input_has_a_label_and_images_and_buttons_have_names(
    page, member, instrument, crystal, recipe, datasets, cold_lab, signed_in, shot
):
    from labbook.samples.models import Preparation
    from labbook.tips import actions as tips

    tip = tips.create_tip(name="W-E2", material="W", origin="etched", actor=member)
    preparation = Preparation.objects.order_by("pk").first()
    signed_in(member)
    problems: list[str] = []
    for path in [
        "/",
        "/samples/",
        f"/samples/{crystal.pk}/",
        f"/samples/log/?sample={crystal.pk}",
        "/datasets/",
        "/datasets/upload/",
        f"/datasets/{datasets[0].pk}/",
        f"/samples/preparations/{preparation.pk}/",
        "/tips/",
        f"/tips/{tip.pk}/",
        "/instruments/",
        f"/instruments/{instrument.pk}/",
        "/cryostats/",
        f"/cryostats/{cold_lab.pk}/",
        "/changes/",
        f"/logbook/{instrument.pk}/",
        "/logbook/note/",
    ]:
        response = page.goto(path)
        if response.status != 200:
            problems.append(f"{path}: answered {response.status}")
            continue
        shot(page, re.sub(r"\d+", "one", path.split("?")[0].strip("/")) or "dashboard")
        if page.evaluate("document.documentElement.scrollWidth > window.innerWidth"):
            problems.append(f"{path}: wider than the 1280 px screen")
        for problem in page.evaluate(A11Y_CHECK):
            problems.append(f"{path}: {problem}")
    assert problems == [], "\n".join(problems)

    # The keyboard: the skip link comes first and is visible when focused, and a focused
    # control draws an outline.
    page.goto("/")
    page.keyboard.press("Tab")
    skip = page.locator(".skip-link")
    assert page.evaluate("document.activeElement.className") == "skip-link"
    assert skip.bounding_box()["y"] >= 0
    page.keyboard.press("Tab")
    outline = page.evaluate("getComputedStyle(document.activeElement).outlineStyle")
    assert outline not in ("none", ""), outline
    shot(page, "focus", full_page=False)


# Our own small check, in the spirit of WCAG 2.2 1.1.1 (non-text content), 1.3.1 and 4.1.2
# (name, role, value): each visible form control has an accessible label, each image an alt,
# each button and link a name, ids are unique.
A11Y_CHECK = """
() => {
  const problems = [];
  const visible = (el) => !!(el.offsetWidth || el.offsetHeight || el.getClientRects().length)
    && getComputedStyle(el).visibility !== "hidden";
  const named = (el) => {
    if ((el.getAttribute("aria-label") || "").trim()) return true;
    const by = el.getAttribute("aria-labelledby");
    const text = (id) => (document.getElementById(id)?.textContent || "").trim();
    if (by && by.split(/\\s+/).some(text)) return true;
    if (el.labels && [...el.labels].some((l) => l.textContent.trim())) return true;
    if ((el.getAttribute("title") || "").trim()) return true;
    return false;
  };
  const describe = (el) => el.outerHTML.slice(0, 120);
  for (const el of document.querySelectorAll("input, select, textarea")) {
    if (el.type === "hidden" || el.type === "submit" || el.type === "button") continue;
    if (el.getAttribute("aria-hidden") === "true" || !visible(el)) continue;
    if (!named(el)) problems.push("unlabelled control " + describe(el));
  }
  for (const img of document.querySelectorAll("img")) {
    if (!img.hasAttribute("alt")) problems.push("image without alt " + describe(img));
  }
  for (const b of document.querySelectorAll("button, a[href], [role=button]")) {
    if (b.getAttribute("aria-hidden") === "true" || !visible(b)) continue;
    const text = (b.innerText || b.textContent || "").trim();
    const imgAlt = [...b.querySelectorAll("img[alt]")].some((i) => i.alt.trim());
    if (!text && !imgAlt && !named(b)) problems.push("control without a name " + describe(b));
  }
  // Text contrast (WCAG 2.2 1.4.3): 4.5:1, or 3:1 for large text (24 px, or 18.66 px bold),
  // against the first opaque background behind the text.
  const rgb = (c) => (c.match(/[\\d.]+/g) || []).map(Number);
  const lum = ([r, g, b]) => {
    const f = (v) => { v /= 255; return v <= 0.03928 ? v / 12.92 : ((v + 0.055) / 1.055) ** 2.4; };
    return 0.2126 * f(r) + 0.7152 * f(g) + 0.0722 * f(b);
  };
  const backdrop = (el) => {
    for (let e = el; e; e = e.parentElement) {
      const c = rgb(getComputedStyle(e).backgroundColor);
      if (c.length === 3 || (c.length === 4 && c[3] === 1)) return c.slice(0, 3);
      if (c.length === 4 && c[3] > 0) return null;  // translucent: not judged here
      if (getComputedStyle(e).backgroundImage !== "none") return null;
    }
    return [255, 255, 255];
  };
  for (const el of document.querySelectorAll("body *")) {
    const own = [...el.childNodes].some((n) => n.nodeType === 3 && n.textContent.trim());
    if (!own || !visible(el) || el.closest(".visually-hidden, [aria-hidden=true]")) continue;
    const style = getComputedStyle(el);
    const fg = rgb(style.color);
    if (fg.length === 4 && fg[3] < 1) continue;
    const bg = backdrop(el);
    if (!bg) continue;
    const [hi, lo] = [lum(fg.slice(0, 3)), lum(bg)].sort((a, b) => b - a);
    const ratio = (hi + 0.05) / (lo + 0.05);
    const size = parseFloat(style.fontSize);
    const large = size >= 24 || (size >= 18.66 && Number(style.fontWeight) >= 700);
    if (ratio < (large ? 3 : 4.5)) {
      problems.push(`contrast ${ratio.toFixed(2)}:1 for "${el.textContent.trim().slice(0, 40)}"`);
    }
  }
  const ids = {};
  for (const el of document.querySelectorAll("[id]")) ids[el.id] = (ids[el.id] || 0) + 1;
  for (const [id, n] of Object.entries(ids)) if (n > 1) problems.push(`id ${id} used ${n} times`);
  return problems;
}
"""
