"""Sessions open and close; notes are kept as typed and land in the right logbook."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.core.exceptions import ValidationError

from labbook.logbook import actions, queries
from labbook.logbook.models import Note, Session
from labbook.samples import actions as sample_actions
from labbook.tips import actions as tip_actions
from tests.tips.conftest import T0

pytestmark = pytest.mark.django_db

H = timedelta(hours=1)
SCRIPT = '<script>alert("apex")</script> **CO** tip: *sharp*'


def iso(at) -> str:
    return at.isoformat().replace("+00:00", "Z")


# --- sessions -------------------------------------------------------------------------------


def test_a_second_open_session_of_the_same_operator_is_refused(member, instrument):
    first = actions.start_session(instrument, start=T0, goal="CO on Cu(111)", actor=member)
    with pytest.raises(ValidationError) as refused:
        actions.start_session(instrument, start=T0 + H, actor=member)
    message = refused.value.message_dict["start"][0]
    assert f"session #{first.pk} of bo on LTM-T from 2026-03-02 09:00 UTC, still open" in message
    assert "end it first" in message
    assert Session.objects.count() == 1

    actions.end_session(first, end=T0 + 8 * H, summary="single CO resolved", actor=member)
    first.refresh_from_db()
    assert (first.end, first.summary) == (T0 + 8 * H, "single CO resolved")
    assert not first.is_open
    second = actions.start_session(instrument, start=T0 + 9 * H, actor=member)
    assert queries.open_session(instrument, member) == second
    assert first.history.first().history_user == member


def test_sessions_of_one_operator_never_overlap_but_two_operators_may_share(
    member, manager, instrument, other_instrument
):
    actions.start_session(instrument, start=T0, end=T0 + 4 * H, actor=member)
    with pytest.raises(ValidationError):  # a past session logged over it
        actions.start_session(instrument, start=T0 + H, end=T0 + 2 * H, actor=member)
    actions.start_session(instrument, start=T0 + H, operator=manager, actor=manager)
    actions.start_session(other_instrument, start=T0 + H, actor=member)
    actions.start_session(instrument, start=T0 + 4 * H, actor=member)  # right after the first
    assert Session.objects.count() == 4


def test_ending_a_session_twice_or_before_it_started_is_refused(member, instrument):
    session = actions.start_session(instrument, start=T0, actor=member)
    with pytest.raises(ValidationError) as early:
        actions.end_session(session, end=T0 - H, actor=member)
    assert "ends after it starts" in early.value.message_dict["end"][0]
    actions.end_session(session, end=T0 + H, actor=member)
    with pytest.raises(ValidationError) as again:
        actions.end_session(session, end=T0 + 2 * H, actor=member)
    assert "already ended" in again.value.message_dict["end"][0]


def test_sessions_over_the_api(member, manager, instrument, api_as):
    api = api_as(member)
    opened = api.post(
        "/sessions", {"instrument": instrument.pk, "start": iso(T0), "goal": "NaCl islands"}
    )
    assert opened.status_code == 201, opened.content
    body = opened.json()
    assert body["operator"] == member.pk and body["operator_username"] == "bo"
    assert body["end"] is None and body["goal"] == "NaCl islands"

    clash = api.post("/sessions", {"instrument": instrument.pk, "start": iso(T0 + H)})
    assert clash.status_code == 422
    assert clash.json()["errors"][0]["field"] == "start"
    assert f"session #{body['id']}" in clash.json()["errors"][0]["message"]

    api_as(manager).post("/sessions", {"instrument": instrument.pk, "start": iso(T0 + H)})
    assert api.get("/sessions", open=True, instrument=instrument.pk).json()["count"] == 2
    ended = api.post(f"/sessions/{body['id']}/end", {"end": iso(T0 + 6 * H), "summary": "done"})
    assert ended.status_code == 200, ended.content
    assert ended.json()["end"] == "2026-03-02T15:00:00Z"
    still_open = api.get("/sessions", open=True).json()
    assert [s["operator_username"] for s in still_open["items"]] == ["mara"]
    assert api.get("/sessions", open=False).json()["items"][0]["id"] == body["id"]
    assert Session.objects.get(pk=body["id"]).history.first().history_user == member


def test_a_session_needs_a_lab_member_as_operator(member, outsider, instrument, api_as):
    response = api_as(member).post(
        "/sessions", {"instrument": instrument.pk, "operator": outsider.pk}
    )
    assert response.status_code == 422
    assert response.json()["errors"][0]["field"] == "operator"


# --- notes ----------------------------------------------------------------------------------


def test_note_text_is_stored_verbatim_and_answered_as_json_text(member, instrument, api_as):
    response = api_as(member).post(
        "/notes", {"text": SCRIPT, "instrument": instrument.pk, "at": iso(T0)}
    )
    assert response.status_code == 201, response.content
    assert response["Content-Type"].startswith("application/json")
    assert response.json()["text"] == SCRIPT
    # No HTML escaping in the store or the JSON: that is the page's job when it renders.
    assert b"&lt;" not in response.content
    note = Note.objects.get()
    assert note.text == SCRIPT
    assert note.author == member and note.history.get().history_user == member
    listed = api_as(member).get("/notes", instrument=instrument.pk).json()
    assert listed["items"][0]["text"] == SCRIPT


def test_a_note_finds_its_logbook(member, instrument, other_instrument, tip, crystal):
    session = actions.start_session(other_instrument, start=T0, actor=member)
    in_session = actions.write_note(text="drift settled", at=T0 + H, session=session, actor=member)
    assert in_session.instrument == other_instrument

    tip_actions.mount_tip(tip, instrument, start=T0, actor=member)
    on_tip = actions.write_note(text="double tip", at=T0 + H, tip=tip, actor=member)
    assert on_tip.instrument == instrument

    sample_actions.transfer_sample(
        crystal, location="microscope_stage", at=T0, instrument=other_instrument, actor=member
    )
    on_sample = actions.write_note(text="step bunching", at=T0 + H, sample=crystal, actor=member)
    assert on_sample.instrument == other_instrument

    with pytest.raises(ValidationError) as nowhere:
        actions.write_note(text="who am I?", at=T0 + H, actor=member)
    assert "instrument" in nowhere.value.message_dict
    with pytest.raises(ValidationError) as both:
        actions.write_note(text="x", at=T0 + H, sample=crystal, tip=tip, actor=member)
    assert "tip" in both.value.message_dict
    with pytest.raises(ValidationError) as mismatch:
        actions.write_note(
            text="x", at=T0 + H, session=session, instrument=instrument, actor=member
        )
    assert f"session #{session.pk} is on LTM-U" in mismatch.value.message_dict["instrument"][0]


def test_notes_search_and_filters(member, instrument, other_instrument, tip, api_as):
    actions.write_note(text="Dosed CO at 5 K", at=T0, instrument=instrument, actor=member)
    actions.write_note(
        text="tip changed after co pick-up", at=T0 + H, tip=tip, instrument=instrument, actor=member
    )
    actions.write_note(text="CO elsewhere", at=T0, instrument=other_instrument, actor=member)
    actions.write_note(text="cryostat refilled", at=T0 + 2 * H, instrument=instrument, actor=member)
    api = api_as(member)
    found = api.get("/notes", instrument=instrument.pk, q="co").json()
    assert found["count"] == 2
    # Newest first, case-insensitive.
    assert [n["text"] for n in found["items"]] == [
        "tip changed after co pick-up",
        "Dosed CO at 5 K",
    ]
    assert api.get("/notes", tip=tip.pk).json()["count"] == 1
    assert api.get("/notes", since=iso(T0 + H)).json()["count"] == 2
    assert api.get("/notes", q="nothing like this").json() == {"items": [], "count": 0}


def test_a_blank_note_is_refused(member, instrument, api_as):
    response = api_as(member).post("/notes", {"text": "   ", "instrument": instrument.pk})
    assert response.status_code == 422
    assert response.json()["errors"][0]["field"] == "text"


# --- who may call what ----------------------------------------------------------------------


def test_anonymous_and_outsiders_are_refused(outsider, instrument, api_as):
    for api, status in ((api_as(None), 401), (api_as(outsider), 403)):
        assert api.get("/sessions").status_code == status
        assert api.get("/notes").status_code == status
        assert api.post("/sessions", {"instrument": instrument.pk}).status_code == status
        assert api.post("/notes", {"text": "x", "instrument": instrument.pk}).status_code == status
        assert api.get(f"/instruments/{instrument.pk}/logbook").status_code == status


def test_a_read_only_token_cannot_write(member, instrument, api_as):
    api = api_as(member, read_only=True)
    assert api.get("/sessions").status_code == 200
    session = actions.start_session(instrument, start=T0, actor=member)
    for path, body in (
        ("/sessions", {"instrument": instrument.pk}),
        (f"/sessions/{session.pk}/end", {}),
        ("/notes", {"text": "x", "instrument": instrument.pk}),
    ):
        response = api.post(path, body)
        assert response.status_code == 403
        assert response.json()["detail"] == "this token is read-only"
    assert not Note.objects.exists()


def test_an_instrument_token_writes_only_its_logbook(
    member, instrument, other_instrument, tip, api_as
):
    api = api_as(member, instrument=instrument)
    assert api.post("/sessions", {"instrument": other_instrument.pk}).status_code == 403
    assert api.post("/sessions", {"instrument": instrument.pk}).status_code == 201
    elsewhere = actions.start_session(other_instrument, start=T0, actor=member)
    assert api.post(f"/sessions/{elsewhere.pk}/end", {}).status_code == 403
    refused = api.post("/notes", {"text": "x", "instrument": other_instrument.pk})
    assert refused.status_code == 403
    assert f"instrument {instrument.pk}" in refused.json()["detail"]
    # Found through the session or the tip's mount: still the other instrument's logbook.
    assert api.post("/notes", {"text": "x", "session": elsewhere.pk}).status_code == 403
    tip_actions.mount_tip(tip, other_instrument, start=T0, actor=member)
    assert api.post("/notes", {"text": "x", "tip": tip.pk, "at": iso(T0 + H)}).status_code == 403
    assert api.post("/notes", {"text": "ok", "instrument": instrument.pk}).status_code == 201
    assert list(Note.objects.values_list("text", flat=True)) == ["ok"]
