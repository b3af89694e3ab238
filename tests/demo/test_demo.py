"""The demo lab: what ``demo`` creates, that it is idempotent, and that its invented readings
behave like the instrument they pretend to come from (FIELD.md §3–4, REFERENCES.md §8)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from io import StringIO
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from django.contrib.auth import get_user_model
from django.core.management import call_command
from django.core.management.base import CommandError
from django.db.models import Count, Max, Min

from labbook.accounts.permissions import is_lab_member, is_manager
from labbook.demo import readings as gen
from labbook.demo.instruments import CHANNELS, insert_readings
from labbook.demo.load import demo_window, load_demo, scenario_for
from labbook.demo.people import DEMO_PASSWORD, PEOPLE
from labbook.instruments.models import Chamber, Channel, Instrument, Reading

# A fixed "now" keeps the window, and so the counts, the same from run to run.
NOW = datetime(2025, 3, 12, 14, 37, 21, tzinfo=UTC)
BERLIN = ZoneInfo("Europe/Berlin")


@pytest.fixture(autouse=True)
def _fast_passwords(settings):
    # PBKDF2's deliberate slowness is not under test here.
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]


def _db_counts() -> dict[str, int]:
    return {
        "users": get_user_model().objects.count(),
        "instruments": Instrument.objects.count(),
        "chambers": Chamber.objects.count(),
        "channels": Channel.objects.count(),
        "readings": Reading.objects.count(),
        "instrument_history": Instrument.history.count(),
        "channel_history": Channel.history.count(),
    }


def _values(name: str) -> np.ndarray:
    rows = Reading.objects.filter(channel__name=name).order_by("t").values_list("value", flat=True)
    return np.array(list(rows))


# --- records ----------------------------------------------------------------------------------


@pytest.mark.django_db
def test_demo_creates_the_people_with_their_roles():
    counts = load_demo(days=3, now=NOW)
    assert counts["users"] == len(PEOPLE) == 5
    users = {u.username: u for u in get_user_model().objects.all()}
    assert set(users) == {"greta", "amira", "jonas", "leo", "nadia"}
    for person in PEOPLE:
        user = users[person.username]
        assert user.check_password(DEMO_PASSWORD)
        assert user.email.endswith("@example.org")
        assert user.first_name and user.last_name
        groups = set(user.groups.values_list("name", flat=True))
        expected = {"manager": {"members", "managers"}, "member": {"members"}, "outsider": set()}
        assert groups == expected[person.role], person.username
    assert is_manager(users["greta"])
    assert is_lab_member(users["amira"]) and not is_manager(users["amira"])
    assert not is_lab_member(users["nadia"])


@pytest.mark.django_db
def test_demo_creates_ltm1_with_its_chambers_and_channels():
    load_demo(days=3, now=NOW)
    ltm = Instrument.objects.get(name="LTM-1")
    assert ltm.time_zone == "Europe/Berlin"
    assert "4.5 K" in ltm.description
    assert dict(ltm.chambers.values_list("kind", "name")) == {
        "preparation": "preparation chamber",
        "microscope": "microscope chamber",
        "load_lock": "load lock",
    }
    channels = {c.name: c for c in ltm.channels.select_related("chamber")}
    assert len(channels) == len(CHANNELS) == 8
    prep = channels["prep chamber ion gauge"]
    assert (prep.quantity, prep.unit, prep.gas, prep.chamber.kind) == (
        "pressure",
        "mbar",
        "N2",
        "preparation",
    )
    assert channels["microscope chamber ion gauge"].chamber.kind == "microscope"
    assert channels["load lock gauge"].chamber.kind == "load_lock"
    assert (channels["STM head temperature"].quantity, channels["STM head temperature"].unit) == (
        "temperature",
        "K",
    )
    for name in ("LHe bath level", "LN2 shield level"):
        assert (channels[name].quantity, channels[name].unit) == ("cryogen_level", "%")
    assert channels["He recovery flow"].unit == "L/min"


@pytest.mark.django_db
def test_history_of_the_demo_records_names_the_manager():
    load_demo(days=3, now=NOW)
    greta = get_user_model().objects.get(username="greta")
    ltm = Instrument.objects.get(name="LTM-1")
    created = ltm.history.get(history_type="+")
    assert created.history_user == greta
    for model in (Chamber, Channel):
        users = set(model.history.values_list("history_user__username", flat=True))
        assert users == {"greta"}, model.__name__


# --- readings in the database -----------------------------------------------------------------


@pytest.mark.django_db
def test_every_channel_is_logged_at_its_interval_over_the_window():
    counts = load_demo(days=3, now=NOW)
    start, end = demo_window(NOW, 3)
    stats = {
        row["channel__name"]: row
        for row in Reading.objects.values("channel__name").annotate(
            n=Count("t"), first=Min("t"), last=Max("t")
        )
    }
    assert set(stats) == {spec.name for spec in CHANNELS}
    for spec in CHANNELS:
        row = stats[spec.name]
        assert row["first"] == start  # the window starts on UTC midnight, on every grid
        assert end - timedelta(seconds=spec.interval_s) < row["last"] <= end
        assert row["n"] == (row["last"] - row["first"]).total_seconds() // spec.interval_s + 1
    assert stats["prep chamber ion gauge"]["n"] > 3 * 144  # every 10 min
    assert stats["LHe bath level"]["n"] < 4 * 48 + 1  # every 30 min: the meter heats the bath
    assert counts["readings"] == Reading.objects.count() == sum(r["n"] for r in stats.values())


@pytest.mark.django_db
def test_logged_values_are_plausible():
    # Three days, far from the bake-out (planned ~5 months after the first reading).
    load_demo(days=3, now=NOW)
    prep = _values("prep chamber ion gauge")
    assert prep.min() > 1e-11 and prep.max() < 1e-4
    assert 5e-11 < np.median(prep) < 5e-10  # UHV base: 1–3e-10 mbar
    stm = _values("microscope chamber ion gauge")
    assert 1e-11 < np.median(stm) < 1e-10 and stm.max() < 1e-8
    load_lock = _values("load lock gauge")
    assert load_lock.min() > 1e-9 and load_lock.max() <= 1000.0
    head = _values("STM head temperature")
    assert head.min() > 4.0 and head.max() < 6.0
    assert 4.4 < np.median(head) < 4.6
    for name in ("LHe bath level", "LN2 shield level"):
        level = _values(name)
        assert level.min() > 0.0 and level.max() <= 100.0, name
    shield = _values("LN2 shield temperature")
    assert shield.min() > 77.0 and shield.max() < 82.0
    flow = _values("He recovery flow")
    assert flow.min() >= 0.0 and 1.0 < np.median(flow) < 2.5  # ~3 L/day of liquid, as gas


@pytest.mark.django_db
def test_running_twice_gives_the_same_counts():
    first = load_demo(days=3, now=NOW)
    before = _db_counts()
    second = load_demo(days=3, now=NOW)
    assert second == first
    assert _db_counts() == before
    # The totals of the steps tested here; later steps' totals are in their own tests.
    own = ("users", "instruments", "chambers", "channels", "readings")
    assert {key: first[key] for key in own} == {
        "users": 5,
        "instruments": 1,
        "chambers": 3,
        "channels": 8,
    } | {"readings": before["readings"]}


@pytest.mark.django_db
def test_a_later_run_appends_only_the_missing_span_and_continues_the_same_story():
    load_demo(days=3, now=NOW)
    # As if LTM-1 had been set up at NOW: the story is anchored a year before that.
    Instrument.objects.filter(name="LTM-1").update(created_at=NOW)
    level = Channel.objects.get(name="LHe bath level")
    kept = dict(Reading.objects.filter(channel=level).values_list("t", "value"))
    later = NOW + timedelta(days=1)
    load_demo(days=3, now=later)
    rows = dict(Reading.objects.filter(channel=level).values_list("t", "value"))
    # Nothing already logged changed; the new day sits on the same 30-min grid.
    assert {t: rows[t] for t in kept} == kept
    assert len(rows) - len(kept) == 48
    # Old and new values are the story's values at their instants, as if logged in one run.
    scenario = scenario_for(Instrument.objects.get(name="LTM-1"), later)
    assert scenario == scenario_for(Instrument.objects.get(name="LTM-1"), NOW)
    instants = sorted(rows)
    t_s = np.array([int(t.timestamp()) for t in instants], dtype=np.int64)
    got = np.array([rows[t] for t in instants])
    np.testing.assert_array_equal(got, gen.lhe_level(scenario, t_s))


@pytest.mark.django_db
def test_a_longer_window_back_fills_without_moving_the_bake_out():
    load_demo(days=2, now=NOW)
    Instrument.objects.filter(name="LTM-1").update(created_at=NOW)
    ltm = Instrument.objects.get(name="LTM-1")
    before = scenario_for(ltm, NOW)
    head = Channel.objects.get(name="STM head temperature")
    count = Reading.objects.filter(channel=head).count()
    load_demo(days=4, now=NOW)
    assert Reading.objects.filter(channel=head).count() == count + 2 * 144
    assert scenario_for(ltm, NOW) == before


@pytest.mark.django_db
def test_insert_readings_skips_rows_that_exist():
    load_demo(days=1, now=NOW)
    channel = Channel.objects.get(name="prep chamber ion gauge")
    have = Reading.objects.filter(channel=channel).count()
    last = int(Reading.objects.filter(channel=channel).aggregate(t=Max("t"))["t"].timestamp())
    # Half the batch overlaps what is logged (a logger resending): only the rest is added.
    t_s = np.arange(last - 5 * 600, last + 5 * 600 + 1, 600, dtype=np.int64)
    added = insert_readings(channel.pk, t_s, np.full(t_s.shape, 2e-10))
    assert added == 5
    assert Reading.objects.filter(channel=channel).count() == have + 5
    # The overlapping rows kept their first values.
    old = Reading.objects.get(channel=channel, t=datetime.fromtimestamp(last, UTC))
    assert old.value != 2e-10


@pytest.mark.django_db
def test_command_prints_how_to_log_in():
    out = StringIO()
    call_command("demo", "--days", "1", stdout=out)
    text = out.getvalue()
    assert "http://127.0.0.1:8000/" in text
    assert DEMO_PASSWORD in text
    for person in PEOPLE:
        assert person.username in text
    assert "manager" in text and "outsider" in text
    quiet = StringIO()
    call_command("demo", "--days", "1", "--quiet", stdout=quiet)
    assert "readings:" not in quiet.getvalue() and DEMO_PASSWORD in quiet.getvalue()
    assert Instrument.objects.filter(name="LTM-1").count() == 1


@pytest.mark.django_db
def test_command_refuses_a_database_with_other_accounts_unless_forced():
    get_user_model().objects.create_user("someone", password="not-the-demo-one")
    with pytest.raises(CommandError, match="besides the demo ones"):
        call_command("demo", "--days", "1", stdout=StringIO())
    assert not Instrument.objects.exists()
    call_command("demo", "--days", "1", "--force", stdout=StringIO())
    assert Instrument.objects.filter(name="LTM-1").exists()


# --- the pure generator -------------------------------------------------------------------


def _year():
    start, end = demo_window(NOW, 365)
    scenario = gen.Scenario(bake_start_s=gen.bake_start_for(start))
    return scenario, gen.time_grid(start, end, 600), gen.time_grid(start, end, 1800)


def test_series_are_deterministic_for_a_seed_and_match_the_instants():
    start, end = demo_window(NOW, 10)
    t = gen.time_grid(start, end, 600)
    a = gen.Scenario(bake_start_s=gen.bake_start_for(start), seed=7)
    b = gen.Scenario(bake_start_s=gen.bake_start_for(start), seed=8)
    for name in gen.SERIES:
        first, again = gen.series(a, name, t), gen.series(a, name, t.copy())
        assert first.shape == t.shape, name
        assert np.isfinite(first).all(), name
        np.testing.assert_array_equal(first, again)
        assert not np.array_equal(first, gen.series(b, name, t)), name
    assert gen.series(a, "prep_pressure", t[:0]).shape == (0,)


def test_values_depend_on_the_instant_not_on_the_window():
    # What makes "insert only the missing span" sound: a sub-window gives the same numbers.
    scenario, t10, _ = _year()
    near_the_bake = slice(len(t10) // 3, len(t10) // 3 + 2000)
    recent = slice(len(t10) - 1500, len(t10))
    for name in gen.SERIES:
        whole = gen.series(scenario, name, t10)
        for part in (near_the_bake, recent):
            got = gen.series(scenario, name, t10[part])
            np.testing.assert_array_equal(got, whole[part], name)


def test_time_grid_is_aligned_and_refuses_naive_datetimes():
    start = datetime(2025, 1, 1, 0, 3, tzinfo=UTC)
    t = gen.time_grid(start, start + timedelta(hours=1), 600)
    assert t.dtype == np.int64
    assert (t % 600 == 0).all() and t[0] == int(start.timestamp()) + 420 and len(t) == 6
    with pytest.raises(ValueError):
        gen.time_grid(datetime(2025, 1, 1), datetime(2025, 1, 2), 600)  # noqa: DTZ001


def test_a_year_has_one_bake_out_and_the_cryostat_is_cold_otherwise():
    scenario, t10, t30 = _year()
    plan = gen.plan(scenario, int(t10[0]), int(t10[-1]))
    bake = plan.bake
    assert bake is not None and t10[0] < bake.heating_start_s < t10[-1]
    assert bake.heating_end_s - bake.heating_start_s == 48 * 3600
    warm_from, cold_again = bake.lhe_empty_s, bake.lhe_first_fill_s + 6 * 3600
    head = gen.head_temperature(scenario, t10)
    cold = (t10 < warm_from) | (t10 > cold_again)
    assert head[cold].min() > 4.3 and head[cold].max() < 6.0
    assert 4.4 < np.median(head[cold]) < 4.6
    heating = (t10 > bake.heating_start_s + 12 * 3600) & (t10 < bake.heating_end_s)
    assert (head[heating] > 280).all()  # warm and empty under the bake
    lhe = gen.lhe_level(scenario, t30)
    assert (lhe[(t30 > bake.ln2_emptied_s + 3600) & (t30 < bake.lhe_first_fill_s)] == 0).all()
    assert (lhe[(t30 < warm_from - 86400) | (t30 > cold_again)] > 5).all()  # never dry
    prep = gen.prep_pressure(scenario, t10)
    assert 1e-5 < prep[heating].max() < 1e-4  # into 1e-5 mbar
    outside = (t10 < bake.heating_start_s) | (t10 > bake.heating_end_s + 14 * 86400)
    assert prep[outside].min() > 1e-11 and prep[outside].max() < 1e-4
    before = np.median(prep[(t10 > bake.heating_start_s - 20 * 86400) & (t10 < warm_from)])
    after = np.median(prep[(t10 > bake.heating_end_s + 20 * 86400)][:2880])
    assert 1e-10 < before < 3e-10 and after < 0.8 * before  # a lower base after the bake


def test_refills_happen_on_working_days_in_working_hours_nitrogen_first():
    scenario, t10, _ = _year()
    plan = gen.plan(scenario, int(t10[0]), int(t10[-1]))
    fills = [tr for tr in plan.lhe + plan.ln2 if tr.kind == "fill" and tr.start_s >= t10[0]]
    assert 120 < sum(tr.cryogen == "LHe" for tr in fills) < 170  # every 2–3 days
    for tr in fills:
        local_start = datetime.fromtimestamp(tr.start_s, UTC).astimezone(BERLIN)
        local_end = datetime.fromtimestamp(tr.end_s, UTC).astimezone(BERLIN)
        assert local_start.weekday() < 5
        assert local_start.hour >= 9 and local_end.hour < 17
        assert tr.level_after_pct > tr.level_before_pct
    ln2_days = {
        datetime.fromtimestamp(tr.start_s, UTC).astimezone(BERLIN).date(): tr.start_s
        for tr in fills
        if tr.cryogen == "LN2"
    }
    for tr in (tr for tr in fills if tr.cryogen == "LHe"):
        day = datetime.fromtimestamp(tr.start_s, UTC).astimezone(BERLIN).date()
        assert ln2_days[day] < tr.start_s  # FIELD.md §3: fill LN2 first, then LHe
    regular = [tr for tr in fills if tr.cryogen == "LHe" and tr.level_after_pct > 90]
    assert all(93 <= tr.level_after_pct <= 97 for tr in regular)
    # Top-ups lose 10-30 % of what leaves the dewar.
    assert all(0.1 <= tr.loss_fraction <= 0.3 for tr in regular)


def _shutdown_and_bake_weeks(scenario, weeks):
    """Weeks in which the story does no sample work: the year-end shutdown and the bake-out."""
    bake = gen.plan(
        scenario, scenario.bake_start_s - 86400, scenario.bake_start_s + 20 * 86400
    ).bake
    quiet = set()
    if bake is not None:
        start = datetime.fromtimestamp(bake.lhe_empty_s, UTC).date()
        end = datetime.fromtimestamp(bake.lhe_first_fill_s, UTC).date() + timedelta(days=7)
        quiet |= {
            (start + timedelta(days=i)).isocalendar()[:2] for i in range((end - start).days + 1)
        }
    quiet |= {week for week in weeks if week[1] in (52, 53, 1)}
    return quiet


def test_sputter_cycles_and_sample_loads_show_in_the_pressures():
    scenario, t10, _ = _year()
    plan = gen.plan(scenario, int(t10[0]), int(t10[-1]))
    sputters = [e for e in plan.episodes if e.kind == "sputter" and e.start_s >= t10[0]]
    days = {datetime.fromtimestamp(e.start_s, UTC).astimezone(BERLIN).date() for e in sputters}
    # Sputtering happens on working days, in every working week of the story.
    assert days and all(day.weekday() < 5 for day in days)
    weeks_with_sputter = {day.isocalendar()[:2] for day in days}
    first, last = min(days), max(days)
    working_weeks = {
        (first + timedelta(days=i)).isocalendar()[:2] for i in range((last - first).days + 1)
    }
    # Most weeks have a cleaning; the rest are the shutdown, the bake-out and crystal swaps.
    quiet = _shutdown_and_bake_weeks(scenario, working_weeks)
    assert len(weeks_with_sputter) >= 0.75 * len(working_weeks - quiet)
    weeks = (t10[-1] - t10[0]) / (7 * 86400)
    assert all(20 * 60 <= e.end_s - e.start_s <= 30 * 60 and e.gas == "Ar" for e in sputters)
    prep = gen.prep_pressure(scenario, t10)
    one = sputters[len(sputters) // 2]
    during = prep[(t10 > one.start_s + 300) & (t10 < one.end_s)]
    assert during.size and (during > 2e-6).all() and (during < 1e-5).all()
    load_lock = gen.load_lock_pressure(scenario, t10)
    assert 0.5 < len(plan.loads) / weeks < 3
    assert np.median(load_lock) < 1e-7 and (load_lock[t10 > t10[0]] >= 1e-9).all()
    vented = np.zeros(t10.shape, dtype=bool)
    for load in plan.loads:
        vented |= (t10 >= load.vent_s) & (t10 < load.pump_s)
    assert vented.any() and (load_lock[vented] > 500).all()


def test_the_year_has_one_pressure_burst_in_the_microscope_chamber():
    import numpy as np

    from labbook.demo.readings import MINUTE, Scenario, microscope_pressure, pressure_burst_s

    scenario = Scenario(bake_start_s=1_760_000_000)
    burst = pressure_burst_s(scenario)
    t = np.arange(burst - 3600, burst + 3600, 60, dtype=np.int64)
    p = microscope_pressure(scenario, t)
    before = p[t < burst - 10 * MINUTE]
    assert before.max() < 1e-10  # quiet UHV before it
    assert p.max() > 5e-9  # the burst: a few 1e-9 mbar
    assert p[-1] < 2e-10  # and gone an hour later
