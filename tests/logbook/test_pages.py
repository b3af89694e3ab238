"""The logbook pages through the real views: the timeline of every kind, newest first, with
its filters and "load older" pages; sessions started and ended; the note form (page and
dialog), whose text is always shown escaped; and who may see them."""

from __future__ import annotations

import json
import re
from datetime import UTC, timedelta

import pytest
from django.test import Client
from django.utils import timezone

from labbook.instruments.actions import record_event
from labbook.logbook import actions
from labbook.logbook.models import Note, Session
from labbook.samples import actions as sample_actions
from labbook.tips import actions as tip_actions

pytestmark = pytest.mark.django_db

SPUTTER = {
    "kind": "sputter",
    "gas": "Ar",
    "energy_ev": "1 keV",
    "current_a": "1 uA",
    "beam_area_cm2": 1,
    "duration_s": "10 min",
    "pressure_mbar": "5e-6 mbar",
}


def as_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def html(response) -> str:
    return response.content.decode()


def local_input(instant) -> str:
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M")


def titles(response) -> list[str]:
    """The entries' titles, in the order the page shows them."""
    return [
        re.sub(r"<[^>]+>", "", t).strip()
        for t in re.findall(r'class="tl-title">(.*?)</(?:a|span)>', html(response), re.S)
    ]


@pytest.fixture
def t0():
    # Mid-morning two days ago, so the day's entries never straddle midnight whenever this runs.
    return (timezone.now() - timedelta(days=2)).replace(hour=9, minute=0, second=0, microsecond=0)


@pytest.fixture
def day(member, manager, instrument, tip, crystal, t0):
    """One working day on the instrument: a session, a preparation, a tip mounted and
    conditioned, a helium transfer and a note."""
    session = actions.start_session(
        instrument, start=t0, goal="CO on Cu(111): find single molecules", actor=member
    )
    preparation = sample_actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=t0 + timedelta(minutes=10),
        steps=[SPUTTER],
        actor=member,
    )
    mount = tip_actions.mount_tip(tip, instrument, start=t0 + timedelta(minutes=40), actor=member)
    conditioning = tip_actions.record_conditioning(
        tip,
        kind="pulse",
        at=t0 + timedelta(minutes=50),
        params={"voltage_v": "-4.7 V", "duration_s": "20 ms"},
        outcome="single apex again",
        actor=member,
    )
    event = record_event(
        instrument,
        kind="cryogen_transfer",
        start=t0 + timedelta(hours=1),
        end=t0 + timedelta(hours=1, minutes=30),
        summary="LHe fill to 95 %",
        actor=manager,
    )
    note = actions.write_note(
        text="drift settled after the fill",
        at=t0 + timedelta(hours=2),
        session=session,
        actor=member,
    )
    return {
        "session": session,
        "preparation": preparation,
        "mount": mount.mount,
        "conditioning": conditioning,
        "event": event,
        "note": note,
    }


def test_the_logbook_shows_entries_of_every_kind_newest_first_with_links(
    member, instrument, tip, crystal, day
):
    page = as_client(member).get(f"/logbook/{instrument.pk}/")
    assert page.status_code == 200
    assert titles(page) == [
        "Note by bo",
        "Cryogen transfer ended",
        "Cryogen transfer started",
        "Voltage pulse on tip W-12",
        "Tip W-12 mounted",
        f"Preparation of {crystal.name}",
        "Session started by bo",
    ]
    text = html(page)
    assert f'href="/samples/preparations/{day["preparation"].pk}/"' in text
    assert f'href="/instruments/events/{day["event"].pk}/"' in text
    assert f'href="/tips/{tip.pk}/#mount-{day["mount"].pk}"' in text
    assert f'href="/tips/{tip.pk}/#conditioning-{day["conditioning"].pk}"' in text
    # Conditioning in readable units, not as stored.
    assert "Voltage -4.7\u00a0V, Duration 20\u00a0ms — single apex again" in text
    assert "CO on Cu(111): find single molecules" in text
    # The day is named once above its entries.
    assert text.count('class="tl-day-title"') == 1


def test_the_kind_filter_shows_only_the_kinds_ticked(member, instrument, day):
    client = as_client(member)
    notes = client.get(f"/logbook/{instrument.pk}/", {"kind": "note"})
    assert titles(notes) == ["Note by bo"]
    assert 'id="kind-note" name="kind" value="note" checked' in html(notes)
    two = client.get(f"/logbook/{instrument.pk}/", {"kind": ["tip_mount", "conditioning"]})
    assert titles(two) == ["Voltage pulse on tip W-12", "Tip W-12 mounted"]


def test_text_search_finds_words_in_the_records(member, instrument, day):
    client = as_client(member)
    found = client.get(f"/logbook/{instrument.pk}/", {"q": "drift"})
    assert titles(found) == ["Note by bo"]
    assert 'value="drift"' in html(found)
    apex = client.get(f"/logbook/{instrument.pk}/", {"q": "single apex"})
    assert titles(apex) == ["Voltage pulse on tip W-12"]
    nothing = client.get(f"/logbook/{instrument.pk}/", {"q": "no such words"})
    assert titles(nothing) == [] and "that matches these filters" in html(nothing)


def test_since_and_until_are_days_in_the_lab_zone(member, instrument, day, t0):
    client = as_client(member)
    later = client.get(f"/logbook/{instrument.pk}/", {"since": (t0 + timedelta(days=1)).date()})
    assert titles(later) == []
    that_day = client.get(
        f"/logbook/{instrument.pk}/",
        {"since": t0.date(), "until": (t0 + timedelta(hours=2)).date()},
    )
    assert len(titles(that_day)) == 7
    backwards = client.get(
        f"/logbook/{instrument.pk}/", {"since": t0.date(), "until": t0.date() - timedelta(days=1)}
    )
    assert "must not be before the first day" in html(backwards)


def test_older_entries_load_a_page_at_a_time(member, instrument, t0):
    for i in range(60):
        actions.write_note(
            text=f"note number {i:02d}",
            at=t0 + timedelta(minutes=i),
            instrument=instrument,
            actor=member,
        )
    client = as_client(member)
    page = client.get(f"/logbook/{instrument.pk}/", {"kind": "note"})
    shown = re.findall(r"note number (\d\d)", html(page))
    assert shown == [f"{i:02d}" for i in range(59, 9, -1)]  # the newest 50
    more = re.search(r'hx-get="([^"]+)"[^>]*hx-target="closest li"', html(page))
    assert more, "no load-older button"
    url = more.group(1).replace("&amp;", "&")
    assert "offset=50" in url and "kind=note" in url
    older = client.get(url)
    assert older.status_code == 200
    part = html(older)
    assert "<html" not in part
    assert re.findall(r"note number (\d\d)", part) == [f"{i:02d}" for i in range(9, -1, -1)]
    assert "Load older entries" not in part  # the last page
    assert 'class="tl-day-title"' not in part  # the same day goes on, unnamed again
    # Without JavaScript the same button is a link to the page at that offset.
    plain = client.get(f"/logbook/{instrument.pk}/", {"kind": "note", "offset": 50})
    assert len(re.findall(r"note number", html(plain))) == 10
    assert "Back to the newest entries" in html(plain)


def test_logbook_without_an_instrument_goes_to_the_only_one(member, instrument):
    response = as_client(member).get("/logbook/")
    assert response.status_code == 302 and response["Location"] == f"/logbook/{instrument.pk}/"


def test_logbook_with_no_instrument_at_all_says_so(member):
    response = as_client(member).get("/logbook/")
    assert response.status_code == 200 and "No instruments yet" in html(response)


# --- sessions ---------------------------------------------------------------------------------


def test_a_session_is_started_and_ended_from_the_page(member, instrument):
    client = as_client(member)
    start = timezone.now().replace(second=0, microsecond=0) - timedelta(hours=3)
    response = client.post(
        f"/logbook/{instrument.pk}/sessions/",
        {"goal": "Ag(100): NaCl islands", "start": local_input(start)},
    )
    assert response.status_code == 302
    session = Session.objects.get()
    assert session.operator == member and session.start == start and session.end is None
    page = html(client.get(f"/logbook/{instrument.pk}/"))
    assert "Open since" in page and "End session" in page

    # A second session of the same operator on the same instrument is refused inline.
    again = client.post(
        f"/logbook/{instrument.pk}/sessions/",
        {"goal": "another", "start": local_input(start + timedelta(hours=1))},
    )
    assert again.status_code == 200 and "end it first" in html(again)

    end = start + timedelta(hours=2)
    response = client.post(
        f"/logbook/sessions/{session.pk}/end/",
        {"summary": "two islands imaged", "end": local_input(end)},
    )
    assert response.status_code == 302
    session.refresh_from_db()
    assert session.end == end and session.summary == "two islands imaged"


# --- notes ------------------------------------------------------------------------------------


def test_the_note_form_saves_a_note_into_the_open_session(member, instrument):
    session = actions.start_session(instrument, actor=member)
    client = as_client(member)
    response = client.post(
        "/logbook/note/",
        {"text": "lock-in phase set to 12°", "instrument": instrument.pk, "next": "/tips/"},
    )
    assert response.status_code == 302 and response["Location"] == "/tips/"
    note = Note.objects.get()
    assert note.text == "lock-in phase set to 12°" and note.author == member
    assert note.instrument == instrument and note.session == session
    assert abs(note.at - timezone.now()) < timedelta(minutes=1)
    assert "in your open session" in html(client.get("/tips/"))


def test_the_note_form_refuses_to_leave_for_another_site(member, instrument):
    response = as_client(member).post(
        "/logbook/note/",
        {"text": "x", "instrument": instrument.pk, "next": "https://elsewhere.example/"},
    )
    assert response.status_code == 302 and response["Location"] == f"/logbook/{instrument.pk}/"


def test_an_empty_note_comes_back_with_the_error(member, instrument):
    response = as_client(member).post(
        "/logbook/note/", {"text": "   ", "instrument": instrument.pk}
    )
    assert response.status_code == 200
    assert "write something first" in html(response)
    assert not Note.objects.exists()


def test_a_note_with_markup_is_shown_escaped_on_the_logbook(member, instrument):
    text = "<script>alert(1)</script> **bold?**\n  - indented line"
    as_client(member).post("/logbook/note/", {"text": text, "instrument": instrument.pk})
    assert Note.objects.get().text == text  # stored exactly as typed
    page = html(as_client(member).get(f"/logbook/{instrument.pk}/"))
    assert "<script>alert(1)</script>" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt; **bold?**\n  - indented line" in page


def test_the_note_dialog_form_is_prefilled_from_the_page_it_opens_on(
    member, instrument, other_instrument, tip
):
    client = as_client(member)
    part = client.get(
        "/logbook/note/",
        {"instrument": other_instrument.pk, "tip": tip.pk, "next": "/tips/"},
        headers={"HX-Request": "true"},
    )
    assert part.status_code == 200
    text = html(part)
    assert text.lstrip().startswith("<form") and "<html" not in text
    assert 'hx-post="/logbook/note/"' in text
    assert f'<option value="{other_instrument.pk}" selected>' in text
    assert f'name="tip" value="{tip.pk}"' in text and "About tip W-12" in text
    assert re.search(r'id="id_about_tip"[^>]*checked', text)
    assert re.search(r'<textarea[^>]*id="id_text"[^>]*autofocus', text)


def test_a_note_saved_from_the_dialog_answers_htmx_without_a_page(member, instrument, tip):
    response = as_client(member).post(
        "/logbook/note/",
        {
            "text": "new tip looks sharp",
            "instrument": instrument.pk,
            "tip": tip.pk,
            "about_tip": "1",
        },
        headers={"HX-Request": "true"},
    )
    assert response.status_code == 204
    trigger = json.loads(response["HX-Trigger"])
    assert "LTM-T logbook" in trigger["labbook:note-saved"]["message"]
    assert Note.objects.get().tip == tip


def test_every_page_has_the_note_button_for_its_instrument(member, instrument):
    client = as_client(member)
    dashboard = html(client.get("/"))
    assert 'id="note-launch"' in dashboard and 'aria-keyshortcuts="n"' in dashboard
    assert '<dialog class="note-dialog"' in dashboard
    on_instrument = html(client.get(f"/instruments/{instrument.pk}/"))
    assert f'href="/logbook/note/?instrument={instrument.pk}&amp;next=' in on_instrument
    # Without a page instrument, the only instrument is chosen when the form opens.
    form = html(client.get("/logbook/note/"))
    assert f'<option value="{instrument.pk}" selected>' in form


# --- who may look -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "path", ["/logbook/", "/logbook/{pk}/", "/logbook/{pk}/entries/", "/logbook/note/"]
)
def test_anonymous_visitors_are_sent_to_log_in_and_outsiders_are_refused(
    outsider, instrument, path
):
    path = path.format(pk=instrument.pk)
    anonymous = Client().get(path)
    assert anonymous.status_code == 302 and anonymous["Location"].startswith("/login/")
    assert as_client(outsider).get(path).status_code == 403


def test_outsiders_cannot_write_notes(outsider, instrument):
    response = as_client(outsider).post(
        "/logbook/note/", {"text": "hello", "instrument": instrument.pk}
    )
    assert response.status_code == 403
    assert not Note.objects.exists()
    assert 'id="note-launch"' not in html(as_client(outsider).get("/login/"))
