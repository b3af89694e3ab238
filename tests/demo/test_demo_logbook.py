"""The demo's tips, instrument events, sessions and notes: made through the actions, telling the
same story as the logged readings and the preparations, and made once however often ``demo``
runs."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest

from labbook.demo import readings as gen
from labbook.demo import tips as demo_tips
from labbook.demo.load import load_demo, scenario_for
from labbook.instruments.models import Instrument, InstrumentEvent, Reading
from labbook.instruments.queries import state_at
from labbook.logbook.models import Note, Session
from labbook.logbook.queries import timeline
from labbook.samples.models import Preparation
from labbook.tips.models import Conditioning, Tip, TipMount
from labbook.tips.queries import tip_state

NOW = datetime(2025, 3, 12, 14, 37, 21, tzinfo=UTC)  # as in test_demo.py
BERLIN = ZoneInfo("Europe/Berlin")
DAYS = 45  # two tip exchanges, a CO dose or two, a dozen helium fills
pytestmark = pytest.mark.django_db


@pytest.fixture(autouse=True)
def _fast_passwords(settings):
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]


@pytest.fixture
def demo():
    return load_demo(days=DAYS, now=NOW)


def _ltm() -> Instrument:
    return Instrument.objects.get(name="LTM-1")


def _story(days: int) -> gen.Plan:
    scenario = scenario_for(_ltm(), NOW)
    start = NOW - timedelta(days=days + 1)
    return gen.plan(scenario, int(start.timestamp()), int(NOW.timestamp()))


def _at(seconds: int) -> datetime:
    return datetime.fromtimestamp(seconds, UTC)


def _window_start(days: int) -> datetime:
    return (NOW - timedelta(days=days)).replace(hour=0, minute=0, second=0, microsecond=0)


# --- tips -------------------------------------------------------------------------------------


def test_tips_and_the_force_sensor(demo):
    tips = {t.name: t for t in Tip.objects.all()}
    assert set(tips) == {spec.name for spec in demo_tips.TIPS}
    assert demo["tips"] == len(tips) == 6
    assert {t.material for t in tips.values()} == {"W", "PtIr"}
    assert tips["PtIr-04"].origin == Tip.Origin.CUT
    assert all(t.origin == Tip.Origin.ETCHED for t in tips.values() if t.material == "W")
    sensor = tips["TF-2 W"]
    assert sensor.sensor_kind == Tip.SensorKind.TUNING_FORK
    # f0 ~20-30 kHz, k ~1800-2000 N/m, measured beside the nominal value, with its method.
    assert 20e3 < sensor.resonance_frequency_hz < 30e3
    assert sensor.resonance_frequency_hz != sensor.resonance_frequency_nominal_hz
    assert 1800 <= sensor.stiffness_n_per_m <= 2000 and sensor.stiffness_nominal_n_per_m
    assert sensor.stiffness_method and sensor.quality_factor > 1e4
    plain = [t for t in tips.values() if t.name != "TF-2 W"]
    assert all(not t.sensor_kind and t.stiffness_n_per_m is None for t in plain)
    assert {h.history_user.username for h in Tip.history.all()} == {"amira"}


def test_mounts_never_overlap_and_change_on_working_days(demo):
    mounts = list(TipMount.objects.filter(instrument=_ltm()).select_related("tip", "mounted_by"))
    assert len(mounts) == demo["tip_mounts"] >= 2
    mounts.sort(key=lambda m: m.start)
    for before, after in zip(mounts, mounts[1:], strict=False):
        assert before.end is not None and before.end <= after.start  # one tip at a time
        assert after.tip != before.tip
        gap = after.start - before.end
        assert timedelta(0) < gap < timedelta(minutes=30)  # out, then the next one in
    assert mounts[-1].end is None  # a tip is in the scanner today
    for mount in mounts:
        local = mount.start.astimezone(BERLIN)
        assert local.weekday() < 5 and 8 <= local.hour < 9, local
        assert mount.history.earliest().history_user == mount.mounted_by
    # Every two to five weeks (a little more when a weekend or a holiday is in the way).
    for before, after in zip(mounts, mounts[1:], strict=False):
        assert timedelta(days=13) < after.start - before.start < timedelta(days=45)


def test_tip_state_inside_a_mount_starts_with_its_field_emission(demo):
    ltm = _ltm()
    for mount in TipMount.objects.filter(instrument=ltm):
        at = mount.start + timedelta(hours=2)
        state = tip_state(ltm, at)
        assert state.tip == mount.tip and state.mount == mount
        first = state.events[0]
        assert first.kind == Conditioning.Kind.FIELD_EMISSION and first.at > mount.start
        assert first.params["voltage_v"] == 100.0 and 1e-6 <= first.params["current_a"] <= 3e-6
        assert first.params_raw["voltage_v"] == "100 V"  # as typed, units and all
        assert first.performed_by == mount.mounted_by
    # Pulses and indentations carry their parameters in the units the keys name.
    for event in Conditioning.objects.filter(kind=Conditioning.Kind.PULSE):
        assert abs(event.params["voltage_v"]) > 4 and event.params["duration_s"] < 1
    for event in Conditioning.objects.filter(kind=Conditioning.Kind.INDENTATION):
        assert 1e-9 <= event.params["depth_m"] <= 3e-9 + 1e-15


def test_co_is_picked_up_shortly_after_each_co_dose(demo):
    ltm = _ltm()
    # Doses whose pick-up would fall after "now" are not followed up yet.
    doses = Preparation.objects.filter(
        recipe__name="CO for tip functionalisation", ended_at__lt=NOW - timedelta(minutes=40)
    )
    assert doses.exists()
    for dose in doses.select_related("operator"):
        pick_up = Conditioning.objects.get(
            kind=Conditioning.Kind.FUNCTIONALISATION,
            at__gt=dose.ended_at,
            at__lt=dose.ended_at + timedelta(minutes=40),
        )
        assert pick_up.params["species"] == "CO" and pick_up.params["verified_by"]
        assert pick_up.performed_by == dose.operator
        state = tip_state(ltm, pick_up.at + timedelta(minutes=1))
        assert state.apex_species == "CO"


# --- instrument events -------------------------------------------------------------------------


def test_each_helium_fill_is_a_cryogen_transfer_and_flags_the_state_after_it(demo):
    ltm = _ltm()
    since = _window_start(DAYS)
    story = _story(DAYS)
    fills = [
        tr
        for tr in story.lhe
        if tr.kind == "fill" and _at(tr.start_s) >= since and _at(tr.end_s) <= NOW
    ]
    assert len(fills) >= 12  # Monday, Wednesday and Friday
    events = {
        e.start: e
        for e in InstrumentEvent.objects.filter(
            instrument=ltm, kind="cryogen_transfer", details__cryogen="LHe"
        )
    }
    assert set(events) == {_at(tr.start_s) for tr in fills}
    level = Reading.objects.filter(channel__name="LHe bath level")
    for tr in fills:
        event = events[_at(tr.start_s)]
        assert event.end == _at(tr.end_s)
        assert event.details["taken_l"] == tr.taken_l > 0
        assert event.details["level_after_pct"] == pytest.approx(tr.level_after_pct, abs=0.05)
        # The level meter agrees with the event: low before, full after.
        before = level.filter(t__lte=event.start).order_by("-t").first()
        after = level.filter(t__gte=event.end).order_by("t").first()
        assert before.value == pytest.approx(event.details["level_before_pct"], abs=3)
        assert after.value == pytest.approx(event.details["level_after_pct"], abs=3)
        assert event.history.get().history_user == event.recorded_by
        during = state_at(ltm, event.start + (event.end - event.start) / 2)
        assert "cryogen_transfer_under_way" in during.flags
        shortly_after = state_at(ltm, event.end + timedelta(minutes=30))
        assert "after_cryogen_transfer" in shortly_after.flags
    ln2 = InstrumentEvent.objects.filter(instrument=ltm, details__cryogen="LN2")
    assert ln2.count() > len(fills)  # nitrogen every working day


def test_load_lock_vents_are_sample_loads(demo):
    ltm = _ltm()
    since = _window_start(DAYS)
    loads = [ld for ld in _story(DAYS).loads if _at(ld.vent_s) >= since and _at(ld.pump_s) <= NOW]
    vents = InstrumentEvent.objects.filter(instrument=ltm, kind=InstrumentEvent.Kind.VENT)
    assert {(v.start, v.end) for v in vents} == {(_at(ld.vent_s), _at(ld.pump_s)) for ld in loads}
    assert {v.summary for v in vents} == {"load lock vented for a sample load"}
    gauge = Reading.objects.filter(channel__name="load lock gauge")
    for vent in vents:
        inside = gauge.filter(t__gte=vent.start, t__lt=vent.end)
        assert all(r.value > 500 for r in inside)
    # Nothing in the readings shows a pump failure, so the demo has none.
    assert not InstrumentEvent.objects.filter(kind=InstrumentEvent.Kind.PUMP_FAILURE).exists()


def test_the_bake_out_matches_the_readings_and_the_tip_stays_in():
    days = 230
    load_demo(days=days, now=NOW)
    ltm = _ltm()
    bake = _story(days).bake
    event = InstrumentEvent.objects.get(instrument=ltm, kind=InstrumentEvent.Kind.BAKEOUT)
    assert (event.start, event.end) == (_at(bake.heating_start_s), _at(bake.heating_end_s))
    zones = event.details["zone_temperatures_k"]
    assert 390 <= zones["chamber"] <= 425 and 295 < zones["cryostat"] < zones["chamber"]
    base = event.details["base_pressure_mbar"]
    assert 5e-11 < base < 2e-10
    prep = Reading.objects.filter(channel__name="prep chamber ion gauge")
    during = [r.value for r in prep.filter(t__gt=event.start + timedelta(hours=6), t__lt=event.end)]
    assert during and min(during) > 1e-8 and max(during) > 1e-6  # into 1e-5 mbar, not UHV
    week_later = event.end + timedelta(days=7)
    settled = [r.value for r in prep.filter(t__gte=week_later, t__lt=week_later + timedelta(1))]
    assert min(settled) < base < max(settled) * 1.5
    assert "bakeout_under_way" in state_at(ltm, event.start + timedelta(hours=12)).flags
    # The cryostat was emptied first: the one maintenance episode the readings show.
    emptied = InstrumentEvent.objects.get(kind=InstrumentEvent.Kind.MAINTENANCE)
    assert emptied.end <= event.start and "emptied" in emptied.summary
    # No work during the bake: no session, no exchange. The tip stays in and is flashed in the
    # first session after the cool-down.
    assert not Session.objects.filter(start__gt=emptied.start, start__lt=event.end).exists()
    cold = _at(bake.lhe_first_fill_s)
    baked = TipMount.objects.get(start__lte=emptied.start, end__gte=cold + timedelta(days=5))
    back = Session.objects.filter(start__gt=cold).order_by("start").first()
    state = tip_state(ltm, back.end)
    assert state.mount == baked
    emissions = [e for e in state.events if e.at > cold]
    assert emissions[0].kind == Conditioning.Kind.FIELD_EMISSION
    assert "after the bake-out" in emissions[0].outcome
    assert emissions[0].performed_by == back.operator
    # The cool-down's first fills are marked as such.
    first_he = InstrumentEvent.objects.get(start=_at(bake.lhe_first_fill_s))
    assert "first helium after the bake-out" in first_he.summary


# --- sessions and notes ------------------------------------------------------------------------


def test_a_session_on_each_measuring_day_ended_the_same_evening(demo):
    sessions = list(Session.objects.filter(instrument=_ltm()).select_related("operator"))
    assert len(sessions) == demo["sessions"] > 20
    days = [s.start.astimezone(BERLIN).date() for s in sessions]
    assert len(set(days)) == len(days)  # one a day
    for session in sessions:
        start, end = session.start.astimezone(BERLIN), session.end.astimezone(BERLIN)
        assert start.weekday() < 5 and start.date() == end.date() and 17 <= end.hour <= 22
        assert session.goal and session.summary
        assert session.operator.groups.filter(name="members").exists()
        history = session.history.order_by("history_date")
        assert {h.history_user for h in history} == {session.operator}
    # Every preparation day's session began before its preparation, by its operator (today's
    # is not over at "now": a later run logs it).
    today = NOW.astimezone(BERLIN).date()
    for prep in Preparation.objects.exclude(recipe__name="CO for tip functionalisation"):
        day = prep.started_at.astimezone(BERLIN).date()
        if day == today:
            continue
        session = next(s for s in sessions if s.start.astimezone(BERLIN).date() == day)
        assert session.start < prep.started_at and session.operator == prep.operator
        assert session.goal.startswith(f"prepare {prep.sample.name}")
    assert any("CO tip" in s.goal for s in sessions)


def test_notes_on_sessions_tips_and_samples(demo):
    notes = list(Note.objects.filter(instrument=_ltm()).select_related("session", "author"))
    assert len(notes) == demo["notes"]
    # Notes are written in working hours on the days someone was at the microscope.
    session_days = {n.session.start.date() for n in notes if n.session}
    assert all(n.at.date() == n.session.start.date() for n in notes if n.session)
    assert session_days and all(n.author is not None for n in notes)
    on_session = [n for n in notes if n.session and not n.tip_id and not n.sample_id]
    on_tip = [n for n in notes if n.tip_id]
    on_sample = [n for n in notes if n.sample_id]
    assert on_session and on_tip and on_sample
    for note in notes:
        assert note.author.groups.filter(name="members").exists()
        assert "<" not in note.text  # realistic lab notes, no markup games
        if note.session is not None:
            assert note.session.start <= note.at <= note.session.end
            assert note.author == note.session.operator
        assert note.history.get().history_user == note.author
    # A repair note follows the conditioning it describes.
    for note in (n for n in on_tip if n.text.startswith("double tip after indentation")):
        recent = Conditioning.objects.filter(
            tip=note.tip, at__gt=note.at - timedelta(minutes=30), at__lt=note.at
        )
        assert list(recent.order_by("at").values_list("kind", flat=True)) == [
            "indentation",
            "pulse",
            "pulse",
        ]


def test_the_timeline_of_a_day_mixes_kinds(demo):
    ltm = _ltm()
    # The last preparation day that is over (today's session is still going on).
    prep = (
        Preparation.objects.exclude(recipe__name="CO for tip functionalisation")
        .filter(started_at__lt=NOW - timedelta(days=1))
        .latest("started_at")
    )
    day = prep.started_at.astimezone(BERLIN).date()
    since = datetime(day.year, day.month, day.day, tzinfo=BERLIN)
    entries = timeline(ltm, since=since, until=since + timedelta(days=1), limit=None)
    kinds = {entry.kind for entry in entries}
    assert {"session", "preparation", "sample_transfer", "instrument_event"} <= kinds
    titles = " ".join(entry.title for entry in entries)
    assert "Cryogen transfer started" in titles and "Session started by" in titles


def test_a_second_run_creates_nothing():
    first = load_demo(days=DAYS, now=NOW)
    models = (Tip, TipMount, Conditioning, InstrumentEvent, Session, Note)
    before = {m.__name__: (m.objects.count(), m.history.count()) for m in models}
    second = load_demo(days=DAYS, now=NOW)
    assert second == first
    assert {m.__name__: (m.objects.count(), m.history.count()) for m in models} == before
    own = ("tips", "tip_mounts", "conditioning", "instrument_events", "sessions", "notes")
    assert all(first[key] > 0 for key in own)


def test_a_later_run_closes_the_open_mount_where_the_story_says():
    load_demo(days=DAYS, now=NOW)
    Instrument.objects.filter(name="LTM-1").update(created_at=NOW)
    open_before = TipMount.objects.get(end=None)
    later = NOW + timedelta(days=60)
    load_demo(days=DAYS, now=later)
    scenario = scenario_for(_ltm(), later)
    schedule = demo_tips.exchanges(scenario, later)
    following = next(e for e in schedule if e.in_at > open_before.start)
    open_before.refresh_from_db()
    assert open_before.end == following.out_at
    mounts = list(TipMount.objects.order_by("start"))
    assert all(
        a.end is not None and a.end <= b.start for a, b in zip(mounts, mounts[1:], strict=False)
    )
    assert {(m.tip.name, m.start) for m in mounts} <= {(e.tip, e.in_at) for e in schedule}
