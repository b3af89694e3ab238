"""Every page in the main navigation, at the chamber PC's 1280×800 and the phone's 390×844:
it answers 200, fetches nothing from outside the lab's server, and fits the phone's width (no
sideways scrolling). Screenshots of every page at 1280×800 and of the dashboard and the planner
at 390×844 land in var/e2e/."""

from __future__ import annotations

import pytest

from tests.e2e.conftest import DESK, PHONE

pytestmark = pytest.mark.e2e

# The pages photographed on a phone too: the manager checks the refill plan on a Sunday.
PHONE_PAGES = ("/", "/cryostats/")


def test_every_page_in_the_nav_answers_and_fits(
    page, manager, instrument, signed_in, shot, live_server
):
    signed_in(manager)
    # Nothing is fetched from elsewhere: the lab network may be closed (no CDN).
    elsewhere: list[str] = []
    page.on(
        "request",
        lambda r: None if r.url.startswith((live_server.url, "data:")) else elsewhere.append(r.url),
    )
    page.goto("/")
    nav = page.get_by_role("navigation", name="Main")
    links = {a.inner_text().strip(): a.get_attribute("href") for a in nav.get_by_role("link").all()}
    # The jobs of the lab, each one link away (the admin's "Setup" is the manager's).
    for name in ("Dashboard", "Samples", "Log preparation", "Tips", "Datasets", "Logbook"):
        assert name in links, f"no {name} in the nav: {sorted(links)}"
    assert links["Cryogen planner"] == "/cryostats/"
    assert links["Change log"] == "/changes/"
    assert "Setup" in links

    overflow: dict[str, int] = {}
    failed: dict[str, int] = {}
    for name, href in links.items():
        for size in (DESK, PHONE):
            page.set_viewport_size(size)
            response = page.goto(href)
            if response.status != 200:
                failed[href] = response.status
                continue
            if href.startswith(("/api/", "/admin/")):  # their own layouts
                page.wait_for_load_state("networkidle")
            else:
                # The lab's zone is named wherever times are shown (the footer says which).
                assert "Times are shown in" in page.locator("footer").inner_text(), href
            if size == DESK or href in PHONE_PAGES:
                shot(page, name)
            wide = page.evaluate("document.documentElement.scrollWidth - window.innerWidth")
            if size == PHONE and wide > 0:
                overflow[href] = wide
            current = page.locator(".mainnav a[aria-current=page]")
            if href in ("/", "/cryostats/", "/changes/", "/samples/", "/tips/", "/datasets/"):
                assert current.count() == 1 and current.get_attribute("href") == href, href
                if size == PHONE:  # the strip is scrolled to show where we are
                    box = current.bounding_box()
                    assert box["x"] >= 0 and box["x"] + box["width"] <= PHONE["width"], href
    assert elsewhere == [], f"pages fetch from outside the lab's server: {elsewhere}"
    assert failed == {}, f"pages that did not answer 200: {failed}"
    # No page scrolls sideways on a phone (the dashboard and the planner above all).
    assert overflow == {}, f"pages wider than the phone (px too wide): {overflow}"


def test_times_are_shown_in_the_lab_zone_and_name_it(
    page, member, instrument, crystal_for_zone, signed_in, settings, shot
):
    from datetime import datetime
    from zoneinfo import ZoneInfo

    settings.TIME_ZONE = "Europe/Zurich"
    signed_in(member)
    page.goto("/")
    footer = page.locator("footer").inner_text()
    assert "Times are shown in Europe/Zurich" in footer
    zone = datetime.now(ZoneInfo("Europe/Zurich")).tzname()  # CET in winter, CEST in summer
    assert f"(now {zone}, UTC+0" in footer
    assert page.locator(".page-sub time").inner_text().endswith(zone)

    page.goto(f"/samples/{crystal_for_zone.pk}/")
    # 08:30 UTC on 15 January is 09:30 CET in Zurich (IANA tz database: UTC+1 in winter).
    main = page.locator("main").inner_text()
    assert "09:30" in main and "CET" in main and "08:30" not in main
    shot(page, "sample")


@pytest.fixture
def crystal_for_zone(member, instrument):
    from datetime import UTC, datetime

    from labbook.samples import actions

    crystal = actions.create_sample(name="Ag(100) #Z", substrate="Ag(100)", actor=member)
    actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=datetime(2026, 1, 15, 8, 30, tzinfo=UTC),  # 09:30 in Zurich (CET, UTC+1)
        actor=member,
        steps=[{"kind": "anneal", "temperature_k": 700, "duration_s": 600, "cleans": True}],
    )
    return crystal
