"""The tip pages through the real views: the list with each tip's current mount, a tip's
details, mounts and conditioning in readable units, mounting (a second tip closes the first,
an overlap is refused inline with what was typed kept), taking out, logging conditioning."""

from __future__ import annotations

import re
from datetime import UTC, timedelta

import pytest
from django.test import Client
from django.utils import timezone

from labbook.tips import actions
from labbook.tips.models import Conditioning, TipMount

pytestmark = pytest.mark.django_db


def as_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def html(response) -> str:
    return response.content.decode()


def local_input(instant) -> str:
    """A time as a datetime-local input sends it (tests run with TIME_ZONE = UTC)."""
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M")


@pytest.fixture
def t0():
    return (timezone.now() - timedelta(days=3)).replace(second=0, microsecond=0)


def test_the_tip_page_shows_its_mounts_and_conditioning_in_readable_units(
    member, instrument, tip, t0
):
    actions.mount_tip(tip, instrument, start=t0, notes="carousel slot 3", actor=member)
    actions.record_conditioning(
        tip,
        kind="field_emission",
        at=t0 + timedelta(hours=1),
        params={"voltage_v": "100 V", "current_a": "2 uA", "duration_s": "30 s"},
        outcome="steady emission, sharp",
        actor=member,
    )
    actions.record_conditioning(
        tip,
        kind="indentation",
        at=t0 + timedelta(hours=2),
        params={"depth_m": "2 nm", "bias_v": "50 mV", "species": "Cu"},
        actor=member,
    )
    page = as_client(member).get(f"/tips/{tip.pk}/")
    assert page.status_code == 200
    text = html(page)
    assert "Tip W-12" in text
    # Now: in the scanner, since when, and what it went through since.
    assert f'href="/instruments/{instrument.pk}/"' in text and "LTM-T" in text
    assert "2 conditioning events" in text
    assert "carries Cu" in text
    # The mount, still open.
    mount = TipMount.objects.get(tip=tip)
    row = re.search(rf'<tr id="mount-{mount.pk}".*?</tr>', text, re.S).group(0)
    assert "still mounted" in row and "carousel slot 3" in row and "3\u00a0d" in row
    # Conditioning in order, parameters in the units a lab reads.
    first = text.index("Field emission")
    second = text.index("Indentation</span>")
    assert first < second
    for shown in ("100\u00a0V", "2\u00a0µA", "30\u00a0s", "2\u00a0nm", "50\u00a0mV"):
        assert shown in text
    assert "typed 2 uA" not in text  # the same value, spelt differently: not repeated
    assert "steady emission, sharp" in text
    # The datasets hook, empty for now.
    assert "No datasets yet" in text


def test_the_force_sensor_shows_measured_beside_nominal(member, other_tip):
    text = html(as_client(member).get(f"/tips/{other_tip.pk}/"))
    assert "tuning-fork force sensor" in text
    assert "1900\u00a0N/m" in text and "nominal 1800\u00a0N/m, +5.6\u00a0%" in text
    assert "30.512\u00a0kHz" in text
    assert "thermal noise at 5 K" in text


def test_the_tip_list_shows_where_each_tip_is(member, instrument, tip, other_tip, t0):
    actions.mount_tip(tip, instrument, start=t0, actor=member)
    page = as_client(member).get("/tips/")
    assert page.status_code == 200
    text = html(page)
    rows = re.findall(r"<tr>.*?</tr>", text, re.S)
    mounted = next(r for r in rows if "W-12" in r)
    idle = next(r for r in rows if "PtIr-3" in r)
    assert "LTM-T" in mounted and "since" in mounted
    assert "in no scanner" in idle


def test_mounting_a_second_tip_closes_the_first(member, instrument, tip, other_tip, t0):
    first = actions.mount_tip(tip, instrument, start=t0, actor=member).mount
    start = t0 + timedelta(days=1)
    client = as_client(member)
    response = client.post(
        f"/tips/{other_tip.pk}/mount/",
        {"instrument": instrument.pk, "start": local_input(start), "notes": "swap after crash"},
    )
    assert response.status_code == 302 and response["Location"] == f"/tips/{other_tip.pk}/"
    first.refresh_from_db()
    assert first.end == start
    second = TipMount.objects.get(tip=other_tip)
    assert second.start == start and second.end is None and second.mounted_by == member
    assert second.notes == "swap after crash"
    followed = html(client.get(response["Location"]))
    assert "PtIr-3 mounted in LTM-T" in followed
    assert "W-12 came out at that instant" in followed


def test_an_overlapping_mount_is_refused_inline_with_what_was_typed_kept(
    member, instrument, tip, other_tip, t0
):
    actions.mount_tip(tip, instrument, start=t0, actor=member)
    earlier = t0 - timedelta(hours=6)
    response = as_client(member).post(
        f"/tips/{other_tip.pk}/mount/",
        {"instrument": instrument.pk, "start": local_input(earlier), "notes": "from slot 5"},
    )
    assert response.status_code == 200
    text = html(response)
    assert not TipMount.objects.filter(tip=other_tip).exists()
    assert "Not mounted." in text
    error = re.search(r'id="mount-start-error">(.*?)</p>', text, re.S).group(1)
    assert "LTM-T holds one tip at a time" in error and "W-12" in error
    assert f'value="{local_input(earlier)}"' in text
    assert 'value="from slot 5"' in text
    assert re.search(r'<input[^>]*id="mount-start"[^>]*autofocus', text)


def test_taking_a_tip_out(member, instrument, tip, t0):
    mount = actions.mount_tip(tip, instrument, start=t0, actor=member).mount
    end = t0 + timedelta(hours=5)
    response = as_client(member).post(f"/tips/{tip.pk}/unmount/", {"end": local_input(end)})
    assert response.status_code == 302
    mount.refresh_from_db()
    assert mount.end == end


def test_taking_out_before_it_went_in_is_refused_inline(member, instrument, tip, t0):
    actions.mount_tip(tip, instrument, start=t0, actor=member)
    response = as_client(member).post(
        f"/tips/{tip.pk}/unmount/", {"end": local_input(t0 - timedelta(hours=1))}
    )
    assert response.status_code == 200
    assert "a mount ends after it starts" in html(response)
    assert TipMount.objects.get(tip=tip).end is None


def test_the_conditioning_form_logs_an_event_with_its_parameters(member, instrument, tip, t0):
    actions.mount_tip(tip, instrument, start=t0, actor=member)
    at = t0 + timedelta(hours=3)
    response = as_client(member).post(
        f"/tips/{tip.pk}/conditioning/",
        {
            "kind": "pulse",
            "at": local_input(at),
            "voltage": "-3.5 V",
            "duration": "50 ms",
            "outcome": "single apex again",
        },
    )
    event = Conditioning.objects.get(tip=tip)
    assert response.status_code == 302
    assert response["Location"] == f"/tips/{tip.pk}/#conditioning-{event.pk}"
    assert event.kind == "pulse" and event.at == at and event.instrument == instrument
    assert event.params == {"voltage_v": -3.5, "duration_s": pytest.approx(0.05)}
    assert event.params_raw == {"voltage_v": "-3.5 V", "duration_s": "50 ms"}
    assert event.performed_by == member
    text = html(as_client(member).get(f"/tips/{tip.pk}/"))
    assert "-3.5\u00a0V" in text and "50\u00a0ms" in text


def test_conditioning_with_a_wrong_unit_comes_back_with_the_error_beside_it(
    member, instrument, tip, t0
):
    actions.mount_tip(tip, instrument, start=t0, actor=member)
    response = as_client(member).post(
        f"/tips/{tip.pk}/conditioning/",
        {
            "kind": "functionalisation",
            "at": local_input(t0 + timedelta(hours=1)),
            "depth": "2 V",
            "bias": "2.5 V",
        },
    )
    assert response.status_code == 200
    text = html(response)
    assert not Conditioning.objects.exists()
    assert 'id="id_depth-error"' in text  # a voltage where a length belongs
    assert 'id="id_species-error"' in text and "names what the apex picked up" in text
    assert 'value="2 V"' in text and 'value="2.5 V"' in text


def test_conditioning_a_tip_in_no_scanner_needs_the_instrument(member, instrument, tip, t0):
    response = as_client(member).post(
        f"/tips/{tip.pk}/conditioning/", {"kind": "field_emission", "at": local_input(t0)}
    )
    assert response.status_code == 200
    assert 'id="id_instrument-error"' in html(response)
    response = as_client(member).post(
        f"/tips/{tip.pk}/conditioning/",
        {"kind": "field_emission", "at": local_input(t0), "instrument": instrument.pk},
    )
    assert response.status_code == 302
    assert Conditioning.objects.get(tip=tip).instrument == instrument


@pytest.mark.parametrize("path", ["/tips/", "/tips/{pk}/"])
def test_anonymous_visitors_are_sent_to_log_in_and_outsiders_are_refused(outsider, tip, path):
    path = path.format(pk=tip.pk)
    anonymous = Client().get(path)
    assert anonymous.status_code == 302 and anonymous["Location"].startswith("/login/")
    assert as_client(outsider).get(path).status_code == 403


def test_outsiders_cannot_mount(outsider, instrument, tip, t0):
    response = as_client(outsider).post(
        f"/tips/{tip.pk}/mount/", {"instrument": instrument.pk, "start": local_input(t0)}
    )
    assert response.status_code == 403
    assert not TipMount.objects.exists()
