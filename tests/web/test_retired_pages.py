"""A retired sample, preparation or tip keeps its page: datasets and their provenance link to
it for years. The page says it is retired and offers nothing that would change it, and the
actions behind the forms still refuse it."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest
from django.test import Client

from labbook.provenance.retirement import retire
from labbook.samples import actions as samples
from labbook.tips import actions as tips

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)


@pytest.fixture
def browser(member) -> Client:
    client = Client()
    client.force_login(member)
    return client


def test_a_retired_tip_page_is_shown_read_only_and_its_actions_refuse_it(
    browser, member, instrument
):
    tip = tips.create_tip(name="W-<b>7</b>", material="W", origin="etched", actor=member)
    live = browser.get(f"/tips/{tip.pk}/")
    assert live.status_code == 200
    assert b'id="mount-form"' in live.content and b"Retired</strong>" not in live.content

    retire([tip], actor=member)
    page = browser.get(f"/tips/{tip.pk}/")
    assert page.status_code == 200
    body = page.content.decode()
    assert "<strong>Retired</strong> on" in body
    assert "W-&lt;b&gt;7&lt;/b&gt;" in body  # the name is still escaped
    for form in ('id="mount-form"', 'id="unmount-form"', 'id="conditioning-form"'):
        assert form not in body
    refused = browser.post(
        f"/tips/{tip.pk}/mount/", {"instrument": instrument.pk, "start": "2026-03-02T10:00"}
    )
    assert refused.status_code == 404
    tip.refresh_from_db()
    assert not tip.mounts.exists()


def test_a_retired_sample_and_its_preparation_keep_their_pages(browser, member, instrument):
    crystal = samples.create_sample(name="Au(111) #3", substrate="Au(111)", actor=member)
    preparation = samples.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0,
        actor=member,
        steps=[{"kind": "anneal", "temperature_k": 720, "duration_s": 600, "cleans": True}],
    )
    retire([preparation], actor=member)
    retire([crystal], actor=member)

    sample_page = browser.get(f"/samples/{crystal.pk}/")
    assert sample_page.status_code == 200
    assert b"<strong>Retired</strong> on" in sample_page.content
    assert b"Log a preparation on this sample" not in sample_page.content

    prep_page = browser.get(f"/samples/preparations/{preparation.pk}/")
    assert prep_page.status_code == 200
    assert b"<strong>Retired</strong> on" in prep_page.content
    assert b"Log it again" not in prep_page.content


def test_pages_of_retired_records_still_need_a_login(member):
    tip = tips.create_tip(name="W-9", material="W", origin="etched", actor=member)
    retire([tip], actor=member)
    response = Client().get(f"/tips/{tip.pk}/")
    assert response.status_code == 302 and "/login/" in response["Location"]
