"""The instrument's logbook: everything that happened on it, newest first, filtered, searched,
in a fixed number of queries."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.core.exceptions import ValidationError

from labbook.instruments import actions as instrument_actions
from labbook.logbook import actions, queries
from labbook.logbook.queries import TimelineEntry, timeline
from labbook.samples import actions as sample_actions
from labbook.tips import actions as tip_actions
from tests.tips.conftest import T0

pytestmark = pytest.mark.django_db

H = timedelta(hours=1)

CLEAN_AND_DOSE = [
    {
        "kind": "sputter",
        "gas": "Ar",
        "energy_ev": "1 keV",
        "current_a": "1 uA",
        "beam_area_cm2": 1,
        "duration_s": "10 min",
        "pressure_mbar": "5e-6 mbar",
    },
    {"kind": "anneal", "temperature_k": "800 K", "duration_s": "15 min", "cleans": True},
    {"kind": "dose", "gas": "CO", "pressure_mbar": "1e-8 mbar", "duration_s": "100 s"},
]


def iso(at) -> str:
    return at.isoformat().replace("+00:00", "Z")


def a_day_on_the_microscope(member, instrument, tip, crystal, start=T0):
    """One working day on LTM-T: bake-out before, a session, a preparation, a transfer,
    a tip mount and its conditioning, notes."""
    instrument_actions.record_event(
        instrument,
        kind="bakeout",
        start=start - 48 * H,
        end=start - 2 * H,
        summary="150 °C, base 3e-11 mbar after",
        actor=member,
    )
    session = actions.start_session(instrument, start=start, goal="CO on Cu(111)", actor=member)
    sample_actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=start + H,
        steps=CLEAN_AND_DOSE,
        actor=member,
    )
    sample_actions.transfer_sample(
        crystal,
        location="microscope_stage",
        at=start + 2 * H,
        instrument=instrument,
        actor=member,
    )
    tip_actions.mount_tip(tip, instrument, start=start + 3 * H, actor=member)
    tip_actions.record_conditioning(
        tip,
        kind="functionalisation",
        at=start + 4 * H,
        params={"species": "CO", "bias_v": "-2.5 V"},
        outcome="contrast inverted",
        actor=member,
    )
    actions.write_note(text="Single CO molecules resolved", at=start + 5 * H, tip=tip, actor=member)
    actions.end_session(session, end=start + 6 * H, summary="good CO tip", actor=member)
    return session


def test_everything_that_happened_newest_first(member, instrument, tip, crystal):
    a_day_on_the_microscope(member, instrument, tip, crystal)
    entries = timeline(instrument)
    assert [(e.at - T0, e.kind, e.title) for e in entries] == [
        (6 * H, "session", "Session ended (bo)"),
        (5 * H, "note", "Note by bo on tip W-12"),
        (4 * H, "conditioning", "Functionalisation on tip W-12"),
        (3 * H, "tip_mount", "Tip W-12 mounted"),
        (2 * H, "sample_transfer", "Cu(111) #3 moved to the microscope stage"),
        (1 * H, "preparation", "Preparation of Cu(111) #3"),
        (0 * H, "session", "Session started by bo"),
        (-2 * H, "instrument_event", "Bake-out ended"),
        (-48 * H, "instrument_event", "Bake-out started"),
    ]
    by_kind = {e.kind: e for e in entries}
    assert by_kind["preparation"].detail == "sputter Ar, anneal, dose CO"
    assert by_kind["conditioning"].detail == "bias_v=-2.5, species=CO — contrast inverted"
    assert by_kind["note"].detail == "Single CO molecules resolved"
    assert by_kind["note"].record_type == "logbook.note"


def test_other_instruments_stay_out(member, instrument, other_instrument, tip, crystal):
    a_day_on_the_microscope(member, instrument, tip, crystal)
    assert timeline(other_instrument) == []


def test_filter_by_kind_and_window(member, instrument, tip, crystal):
    a_day_on_the_microscope(member, instrument, tip, crystal)
    sessions_only = timeline(instrument, kinds=["session"])
    assert [e.title for e in sessions_only] == ["Session ended (bo)", "Session started by bo"]
    assert {e.kind for e in timeline(instrument, kinds=["note", "tip_mount"])} == {
        "note",
        "tip_mount",
    }
    # A window from 2 h on: the session's start and the bake-out fall outside, its end inside.
    window = timeline(instrument, since=T0 + 2 * H, until=T0 + 6 * H)
    assert [e.at - T0 for e in window] == [6 * H, 5 * H, 4 * H, 3 * H, 2 * H]
    assert timeline(instrument, since=T0 - 3 * H, until=T0 - H)[0].title == "Bake-out ended"
    with pytest.raises(ValidationError) as unknown:
        timeline(instrument, kinds=["gossip"])
    assert "unknown kind gossip" in unknown.value.message_dict["kind"][0]


def test_text_search_across_kinds(member, instrument, tip, crystal):
    a_day_on_the_microscope(member, instrument, tip, crystal)
    co = timeline(instrument, q="CO")
    # A plain case-insensitive substring: "microscope stage" contains "co" too.
    assert [e.title for e in co] == [
        "Session ended (bo)",  # its summary: "good CO tip"
        "Note by bo on tip W-12",
        "Functionalisation on tip W-12",
        "Cu(111) #3 moved to the microscope stage",
        "Preparation of Cu(111) #3",  # the CO dose
        "Session started by bo",
    ]
    assert [e.kind for e in timeline(instrument, q="single co")] == ["note"]
    assert [e.title for e in timeline(instrument, q="bake")] == [
        "Bake-out ended",
        "Bake-out started",
    ]
    assert [e.kind for e in timeline(instrument, q="W-12")] == [
        "note",
        "conditioning",
        "tip_mount",
    ]
    assert [e.kind for e in timeline(instrument, q="field emission")] == []
    assert [e.kind for e in timeline(instrument, q="functionalisation")] == ["conditioning"]
    assert [e.kind for e in timeline(instrument, q="microscope stage")] == ["sample_transfer"]


def test_limit_keeps_the_newest_entries_of_long_periods(member, manager, instrument):
    # A long session whose end is the newest entry, and a short one inside it.
    long = actions.start_session(instrument, start=T0, end=T0 + 10 * H, actor=member)
    actions.start_session(instrument, start=T0 + H, end=T0 + 2 * H, operator=manager, actor=member)
    newest = timeline(instrument, limit=1)
    assert [(e.record, e.at) for e in newest] == [(long, T0 + 10 * H)]
    page = timeline(instrument, limit=2, offset=1)
    assert [e.at - T0 for e in page] == [2 * H, 1 * H]


def test_the_query_count_does_not_grow_with_the_entries(
    member, instrument, tip, other_tip, crystal, django_assert_max_num_queries
):
    a_day_on_the_microscope(member, instrument, tip, crystal)
    # Seven sources, preparations with their steps in a second query.
    with django_assert_max_num_queries(8):
        few = timeline(instrument)
    tip_actions.unmount_tip(tip.mounts.get(), end=T0 + 7 * H, actor=member)
    for day in range(1, 6):
        start = T0 + 24 * H * day
        a_day_on_the_microscope(
            member, instrument, tip if day % 2 else other_tip, crystal, start=start
        )
        tip_actions.unmount_tip(
            (tip if day % 2 else other_tip).mounts.get(end__isnull=True),
            end=start + 7 * H,
            actor=member,
        )
    with django_assert_max_num_queries(8):
        many = timeline(instrument, q="co")
    with django_assert_max_num_queries(8):
        everything = timeline(instrument, limit=None)
    assert len(everything) > 5 * len(few) and len(many) > 0


def test_other_apps_add_their_entries_through_a_source(member, instrument, monkeypatch):
    monkeypatch.setattr(queries, "_sources", dict(queries._sources))

    def refills(instrument, since, until):  # the plain three-argument form
        return [
            TimelineEntry(T0 + H, "refill", "LHe refill", "62 L transferred", instrument),
            TimelineEntry(T0 - 99 * H, "refill", "LHe refill", "old", instrument),
        ]

    queries.register_timeline_source("refill", refills)
    actions.write_note(text="helium ordered", at=T0, instrument=instrument, actor=member)
    assert [e.kind for e in timeline(instrument, since=T0 - H)] == ["refill", "note"]
    # The composer filters text for a source that cannot: "62 L" is in the refill's detail.
    assert [e.title for e in timeline(instrument, q="62 l")] == ["LHe refill"]
    assert "refill" in queries.timeline_kinds()


# --- the endpoint ---------------------------------------------------------------------------


def test_the_logbook_endpoint_pages_filters_and_searches(member, instrument, tip, crystal, api_as):
    session = a_day_on_the_microscope(member, instrument, tip, crystal)
    api = api_as(member)
    first = api.get(f"/instruments/{instrument.pk}/logbook", limit=4)
    assert first.status_code == 200, first.content
    body = first.json()
    assert [item["kind"] for item in body["items"]] == [
        "session",
        "note",
        "conditioning",
        "tip_mount",
    ]
    assert body["items"][0] == {
        "at": "2026-03-02T15:00:00Z",
        "kind": "session",
        "title": "Session ended (bo)",
        "detail": "good CO tip",
        "record_type": "logbook.session",
        "record_id": session.pk,
    }
    assert body["next_offset"] == 4
    rest = api.get(f"/instruments/{instrument.pk}/logbook", limit=10, offset=4).json()
    assert len(rest["items"]) == 5 and rest["next_offset"] is None

    kinds = api.get(f"/instruments/{instrument.pk}/logbook", kind="note,preparation").json()
    assert [item["kind"] for item in kinds["items"]] == ["note", "preparation"]
    repeated = api.client.get(
        f"/api/v1/instruments/{instrument.pk}/logbook?kind=note&kind=tip_mount",
        headers=api.headers,
    ).json()
    assert [item["kind"] for item in repeated["items"]] == ["note", "tip_mount"]

    window = api.get(
        f"/instruments/{instrument.pk}/logbook",
        since=iso(T0 + 2 * H),
        until=iso(T0 + 4 * H),
        q="w-12",
    ).json()
    assert [item["title"] for item in window["items"]] == [
        "Functionalisation on tip W-12",
        "Tip W-12 mounted",
    ]
    unknown = api.get(f"/instruments/{instrument.pk}/logbook", kind="gossip")
    assert unknown.status_code == 422
    assert unknown.json()["errors"][0]["field"] == "kind"
    assert api.get("/instruments/999999/logbook").status_code == 404


def test_the_logbook_endpoint_has_a_fixed_query_count(
    member, instrument, tip, other_tip, crystal, api_as, django_assert_max_num_queries
):
    api = api_as(member)
    a_day_on_the_microscope(member, instrument, tip, crystal)
    api.get("/me")  # the token's first use writes last_used_at once
    # Token and groups, the instrument, then the eight of the sources.
    with django_assert_max_num_queries(11):
        assert len(api.get(f"/instruments/{instrument.pk}/logbook").json()["items"]) == 9
    tip_actions.unmount_tip(tip.mounts.get(), end=T0 + 7 * H, actor=member)
    a_day_on_the_microscope(member, instrument, other_tip, crystal, start=T0 + 24 * H)
    with django_assert_max_num_queries(11):
        assert len(api.get(f"/instruments/{instrument.pk}/logbook").json()["items"]) == 19
