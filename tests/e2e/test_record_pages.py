"""The pages of single records, which the navigation does not list: a sample and its
preparation, a tip and its audit, a dataset with its provenance, an instrument with its
plots, a cryostat, the logbook of an instrument, the integrity check and the crate picker.
Each answers 200 at the chamber PC's 1280×800, fetches nothing from outside the lab's server,
names the lab's time zone, and is photographed into var/e2e/."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.utils import timezone

from tests.e2e.test_journeys import cold_lab, datasets  # noqa: F401 - fixtures used below

pytestmark = pytest.mark.e2e


@pytest.fixture
def mounted_tip(member, instrument):
    from labbook.tips import actions as tips

    tip = tips.create_tip(name="W-31", material="W", origin="etched", actor=member)
    start = timezone.now() - timedelta(days=3)
    tips.mount_tip(tip, instrument=instrument, start=start, actor=member)
    return tip


def test_every_record_page_answers_names_the_zone_and_is_photographed(
    page, manager, instrument, datasets, cold_lab, mounted_tip, signed_in, shot, live_server  # noqa: F811
):
    signed_in(manager)
    elsewhere: list[str] = []
    page.on(
        "request",
        lambda r: None if r.url.startswith((live_server.url, "data:")) else elsewhere.append(r.url),
    )
    dataset = datasets[1]
    preparation = dataset.preparation
    pages = {
        "sample": f"/samples/{dataset.sample_id}/",
        "preparation": f"/samples/preparations/{preparation.pk}/",
        "tip": f"/tips/{mounted_tip.pk}/",
        "tip audit": f"/changes/tips/{mounted_tip.pk}/",
        "dataset": f"/datasets/{dataset.pk}/",
        "instrument": f"/instruments/{instrument.pk}/",
        "cryostat": f"/cryostats/{cold_lab.pk}/",
        "instrument logbook": f"/logbook/{instrument.pk}/",
        "integrity": "/datasets/integrity/",
        "crate picker": f"/provenance/crates/new/?ids={datasets[0].pk},{dataset.pk}",
        "upload": "/datasets/upload/",
    }
    failed: dict[str, int] = {}
    for name, path in pages.items():
        response = page.goto(path)
        if response.status != 200:
            failed[path] = response.status
            continue
        page.wait_for_load_state("networkidle")  # the plots and thumbnails arrive
        assert "Times are shown in" in page.locator("footer").inner_text(), path
        assert page.locator("h1").count() == 1, f"{path} has no single page heading"
        broken = page.evaluate(
            "[...document.images].filter(i => i.complete && i.naturalWidth === 0)"
            ".map(i => i.src)"
        )
        assert broken == [], f"{path}: images that did not load: {broken}"
        if name == "crate picker":  # the datasets a link names are ticked already
            picked = page.locator("input[name=ids]:checked").evaluate_all(
                "boxes => boxes.map(b => b.value)"
            )
            assert sorted(picked) == sorted([str(datasets[0].pk), str(dataset.pk)])
        if name == "dataset":  # JSON fields in its changes are summed up, not printed whole
            assert '"histogram"' not in page.locator("#changes").inner_text()
        shot(page, name)
    assert failed == {}, f"pages that did not answer 200: {failed}"
    assert elsewhere == [], f"pages fetch from outside the lab's server: {elsewhere}"
