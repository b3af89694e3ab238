"""The provenance panel of the dataset page: the preparations since the cleaning with their
steps, the neighbours as links, the exports; and the page refuses outsiders."""

from __future__ import annotations

import pytest
from django.test import Client

pytestmark = pytest.mark.django_db


def section(page: str, element_id: str) -> str:
    start = page.index(f'id="{element_id}"')
    end = page.find("</section>", start)
    return page[start:end]


@pytest.fixture
def logged_in(member) -> Client:
    client = Client()
    client.force_login(member)
    return client


def test_the_panel_shows_preparations_neighbours_and_exports(history, logged_in):
    record = history.files["nacl"]
    response = logged_in.get(f"/datasets/{record.pk}/")
    assert response.status_code == 200
    page = response.content.decode()
    panel = section(page, "provenance")
    p0, p1, p2, _ = history.preparations
    # The cleaning and the NaCl after it, not the Ag of the day before.
    assert f'href="/samples/preparations/{p1.pk}/"' in panel
    assert f'href="/samples/preparations/{p2.pk}/"' in panel
    assert f'href="/samples/preparations/{p0.pk}/"' not in panel
    assert "holds the last cleaning" in panel and "Sputter" in panel and "Anneal" in panel
    assert "NaCl" in panel and "0.400\u00a0ML" in panel
    # Neighbours as links: nacl-2 shares the tip state and the surface state.
    twin = history.files["nacl-2"].pk
    for key in ("tip_state", "surface_state", "session"):
        block = panel[panel.index(f'id="neighbours-{key}"') :]
        assert f'href="/datasets/{twin}/"' in block.split('id="neighbours-')[1]
    assert record.sha256 in panel
    assert "Scan size" in panel and "10.0\u00a0nm × 10.0\u00a0nm" in panel
    assert "The lineage stored with this dataset is out of date" not in panel
    exports = section(page, "exports")
    assert f'href="/api/v1/files/{record.pk}/crate.zip"' in exports
    assert f'href="/api/v1/files/{record.pk}/provenance.prov.json"' in exports


def test_the_panel_says_when_the_stored_lineage_is_stale(history, logged_in, member):
    from labbook.samples.actions import record_preparation
    from tests.provenance.conftest import NACL, T0, H, M

    record_preparation(
        sample=history.sample,
        instrument=history.instrument,
        started_at=T0 + 2 * H + 30 * M,
        steps=[NACL],
        actor=member,
    )
    page = logged_in.get(f"/datasets/{history.files['nacl'].pk}/").content.decode()
    assert "The lineage stored with this dataset is out of date" in section(page, "provenance")


def test_the_record_history_of_the_audit_part_is_included_when_present(history, logged_in):
    from django.template import Context, Template

    from labbook.provenance.views import _has_history_tag

    if not _has_history_tag():
        pytest.skip("the audit part's record_history tag is not there yet")
    record = history.files["co"]
    page = logged_in.get(f"/datasets/{record.pk}/").content.decode()
    rendered = Template("{% load audit %}{% record_history file %}").render(
        Context({"file": record})
    )
    # The tag's own first line, right after the provenance panel and before the correction
    # form (times in it depend on the page's zone, so the whole text is not compared).
    opening = rendered.strip().splitlines()[0]
    after_panel = page[page.index('id="provenance"') : page.index('id="correct"')]
    assert opening in after_panel
    assert "by Bo Ferrand" in after_panel[after_panel.index(opening) :]


def test_the_page_refuses_outsiders_and_sends_anonymous_to_login(history, outsider):
    url = f"/datasets/{history.files['co'].pk}/"
    assert Client().get(url).status_code == 302
    client = Client()
    client.force_login(outsider)
    assert client.get(url).status_code == 403


def test_the_panel_reads_no_more_for_a_longer_history(history, logged_in):
    from django.db import connection
    from django.test.utils import CaptureQueriesContext

    def count(name: str) -> int:
        with CaptureQueriesContext(connection) as captured:
            assert logged_in.get(f"/datasets/{history.files[name].pk}/").status_code == 200
        return len(captured)

    # "nacl": two preparations since the cleaning and one conditioning event; "co": three
    # preparations and two events. (With no event at all there is one query fewer: nobody's
    # name is looked up.)
    assert count("co") == count("nacl")
