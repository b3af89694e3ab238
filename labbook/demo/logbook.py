"""The demo lab's logbook on LTM-1: instrument events, a session per measuring day, and notes.

* **Instrument events** come from the readings story (:func:`readings.plan`), at the instants
  the logged values show them, so the logbook and the plots agree: the bake-out (its heating
  window, the zone temperatures and the base pressure a week later), every LHe and LN2 fill as a
  cryogen transfer (the litres taken from the supply dewar, the level before and after), every
  sample-load vent of the load lock, and — the one maintenance episode the readings show — the
  cryostat being emptied for the bake-out. The readings show no pump failure, so none is logged.
* **Sessions**: one per working day on which something is measured, i.e. a crystal sits on the
  microscope stage (from the samples step's transfers). On a preparation day the session
  begins with the preparation and is run by its operator; otherwise by the crystal's owner
  mostly, the postdoc or the lab manager sometimes. Each ends the same evening, after the
  day's last preparation (a CO dose) and pick-up. The goal is written from what was on the
  stage (the surface state after its last preparation), the tip in the scanner (STM tip or
  tuning-fork sensor) and whether the tip took up a CO that day; the summary says what came
  of it.
* **Notes**, a few a week: on the session (a helium fill that interrupted a grid, drift, the
  lock-in), on the tip (a repair after a bad indentation, a newly mounted tip) and on the
  sample (what the surface looked like).

The day plan of the sessions (:func:`planned_sessions`) is shared with :mod:`labbook.demo.tips`,
whose pulses, indentations and pick-ups happen inside them, by their operator. Everything goes
through the actions (``instruments.actions.record_event``, ``logbook.actions``) acting as the
person who did it, and is found again by its natural key (event instrument + kind + start,
session instrument + operator + start, note instrument + at + author), so a second run adds
nothing. Invented data only (DESIGN.md §5).
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
from django.db import transaction

from labbook.demo import DemoContext
from labbook.demo import samples as demo_samples
from labbook.demo.readings import DAY, HOUR, Plan, Scenario, Transfer, plan, prep_pressure
from labbook.instruments.actions import record_event
from labbook.instruments.models import Chamber, InstrumentEvent
from labbook.logbook.actions import end_session, start_session, write_note
from labbook.logbook.models import Note, Session
from labbook.samples import queries as sample_queries
from labbook.samples.models import Location, Preparation, Sample
from labbook.samples.models import Transfer as SampleTransfer
from labbook.samples.queries import SurfaceState
from labbook.tips import queries as tip_queries
from labbook.tips.models import Conditioning, TipMount

# Seed topics of their own, so these choices never shift the readings' (1-3) or samples' (21).
_TOPIC_SESSION = 41
_TOPIC_NOTE = 42
_TOPIC_EVENT = 43

# Days relative to the bake-out Monday with no work at the microscope: the readings' story has
# no preparation and no sample load then (readings._NO_WORK), and the cryostat is warm.
NO_WORK_DAYS = range(-2, 9)
CO_RECIPE = "CO for tip functionalisation"
# The bake-out as the lab sets it (FIELD.md §4: LT-STMs at ~120-150 °C with the cryostat warm
# and empty); the cryostat is held at what its shield diode shows in the readings (~325 K).
BAKE_ZONES_K = {"chamber": 408.0, "cryostat": 325.0}
# The base pressure after the bake is what the prep chamber gauge reads once it has settled.
BASE_PRESSURE_AFTER = timedelta(days=7)


# --- the lab's calendar -----------------------------------------------------------------------


def story_start(scenario: Scenario) -> datetime:
    """When the demo story begins: the crystals arrive and the first tip is in the scanner."""
    bake = datetime.fromtimestamp(scenario.bake_start_s, UTC)
    return bake - timedelta(days=demo_samples.STORY_LEAD_DAYS)


def local_time(day: date, hours: float, zone: ZoneInfo) -> datetime:
    """``hours`` after local midnight of ``day``, as an aware UTC instant in whole seconds.
    Wall-clock arithmetic; everything is in working hours, far from the daylight-saving
    switch at night."""
    midnight = datetime(day.year, day.month, day.day, tzinfo=zone)
    return (midnight + timedelta(seconds=round(hours * HOUR))).astimezone(UTC)


def local_day(at: datetime, zone: ZoneInfo) -> date:
    return at.astimezone(zone).date()


def bake_day(scenario: Scenario) -> date:
    return local_day(
        datetime.fromtimestamp(scenario.bake_start_s, UTC), ZoneInfo(scenario.time_zone)
    )


def is_lab_day(day: date, scenario: Scenario) -> bool:
    """A day someone works at the microscope: a weekday, outside the Christmas shutdown and the
    bake-out (the same calendar the readings' story keeps)."""
    if day.weekday() >= 5:
        return False
    if (day.month == 12 and day.day >= 24) or (day.month == 1 and day.day == 1):
        return False
    return (day - bake_day(scenario)).days not in NO_WORK_DAYS


def _at(seconds: int) -> datetime:
    return datetime.fromtimestamp(int(seconds), UTC)


def _minute(at: datetime) -> datetime:
    """People write times to the minute."""
    return at.replace(second=0, microsecond=0)


def _rng(scenario: Scenario, topic: int, key: int) -> np.random.Generator:
    return np.random.default_rng([scenario.seed, topic, key])


# --- the day plan of the sessions -----------------------------------------------------------


@dataclass(frozen=True)
class PlannedSession:
    """A measuring day: who works, from when to when, and what sits on the stage. On a
    preparation day ``preparations`` are the day's (the cleaning first) and the sample is on
    the stage from ``measure_from``."""

    day: date
    operator: Any  # a user
    start: datetime
    end: datetime
    sample: Sample
    measure_from: datetime
    preparations: tuple[Preparation, ...] = ()

    @property
    def doses(self) -> list[Preparation]:
        """The day's CO doses for the tip, oldest first."""
        return [p for p in self.preparations if p.recipe is not None and p.recipe.name == CO_RECIPE]


def _on_stage(ctx: DemoContext, at: datetime) -> Sample | None:
    """The demo crystal on LTM-1's microscope stage at ``at``, if any."""
    names = [crystal.name for crystal in demo_samples.CRYSTALS]
    for sample in Sample.objects.filter(name__in=names).order_by("name"):
        where = sample_queries.location_at(sample, at)
        if (
            where is not None
            and where.location == Location.MICROSCOPE_STAGE
            and where.instrument_id == ctx.instrument.pk
        ):
            return sample
    return None


def _owner(sample: Sample) -> str:
    return next((c.owner for c in demo_samples.CRYSTALS if c.name == sample.name), "amira")


def planned_sessions(ctx: DemoContext, scenario: Scenario) -> list[PlannedSession]:
    """The measuring days in the demo window, oldest first, from the preparations and
    transfers the samples step logged (read from its tables, as the samples demo writes them)
    and a generator per day: the same list on every run."""
    zone = ZoneInfo(scenario.time_zone)
    since = max(ctx.start, story_start(scenario))
    ltm = ctx.instrument
    by_day: dict[date, list[Preparation]] = defaultdict(list)
    for prep in (
        Preparation.objects.filter(
            instrument=ltm,
            retired_at__isnull=True,
            started_at__gte=since,
            started_at__lte=ctx.now,
        )
        .select_related("operator", "recipe", "sample")
        .order_by("started_at", "pk")
    ):
        by_day[local_day(prep.started_at, zone)].append(prep)
    staged: dict[date, SampleTransfer] = {}
    for move in (
        SampleTransfer.objects.filter(
            instrument=ltm,
            location=Location.MICROSCOPE_STAGE,
            retired_at__isnull=True,
            at__gte=since,
            at__lte=ctx.now,
        )
        .select_related("sample")
        .order_by("at")
    ):
        staged[local_day(move.at, zone)] = move

    sessions = []
    day, last = local_day(since, zone), local_day(ctx.now, zone)
    while day <= last:
        planned = _plan_day(ctx, scenario, day, by_day.get(day, []), staged.get(day), zone)
        if planned is not None and planned.start >= since and planned.end <= ctx.now:
            sessions.append(planned)
        day += timedelta(days=1)
    return sessions


def _plan_day(
    ctx: DemoContext,
    scenario: Scenario,
    day: date,
    preparations: list[Preparation],
    staged: SampleTransfer | None,
    zone: ZoneInfo,
) -> PlannedSession | None:
    if not is_lab_day(day, scenario):
        return None
    u = _rng(scenario, _TOPIC_SESSION, day.toordinal()).random(8)
    evening = local_time(day, 17.5 + 3.5 * u[3], zone)
    if preparations:
        if staged is None:
            return None  # the prepared crystal is not on the stage yet: nothing measured
        first = preparations[0]
        # The session opens before the other crystal leaves the stage (25 min before the
        # sputter) and lasts until the day's last preparation and the pick-up after it are done.
        measure_from = staged.at + timedelta(minutes=10)
        last_done = max(p.ended_at or p.started_at for p in preparations)
        return PlannedSession(
            day=day,
            operator=first.operator,
            start=_minute(first.started_at - timedelta(minutes=40)),
            end=_minute(
                max(evening, last_done + timedelta(minutes=75), measure_from + timedelta(hours=2))
            ),
            sample=staged.sample,
            measure_from=measure_from,
            preparations=tuple(preparations),
        )
    if u[0] < 0.08:
        return None  # nobody at the microscope today (a conference, a thesis chapter)
    start = local_time(day, 8.75 + 1.5 * u[1], zone)
    sample = _on_stage(ctx, start)
    if sample is None:
        return None
    who = _owner(sample) if u[2] < 0.65 else ("amira" if u[2] < 0.9 else "greta")
    return PlannedSession(
        day=day,
        operator=ctx.users[who],
        start=_minute(start),
        end=_minute(evening),
        sample=sample,
        measure_from=start + timedelta(minutes=15),
    )


# --- instrument events ----------------------------------------------------------------------


class _Events:
    """Instrument events through ``record_event``, skipping those a previous run made."""

    def __init__(self, ctx: DemoContext) -> None:
        self.ctx = ctx
        self.have = set(
            InstrumentEvent.objects.filter(instrument=ctx.instrument).values_list("kind", "start")
        )
        self.new = 0

    def add(self, kind: str, start: datetime, end: datetime, actor, **kw: Any) -> None:
        if end > self.ctx.now or (kind, start) in self.have:
            return  # still under way at "now" (a later run logs it), or logged already
        record_event(self.ctx.instrument, kind=kind, start=start, end=end, actor=actor, **kw)
        self.have.add((kind, start))
        self.new += 1


def _who_fills(ctx: DemoContext, scenario: Scenario, transfer: Transfer) -> Any:
    # Helium is mostly the lab manager's job (a two-person transfer she leads); nitrogen is
    # topped up by whoever is in first.
    u = _rng(scenario, _TOPIC_EVENT, transfer.start_s).random()
    if transfer.cryogen == "LHe":
        name = "greta" if u < 0.6 else "amira"
    else:
        name = ("greta", "amira", "jonas", "leo")[min(int(u * 4), 3)]
    return ctx.users[name]


def _fill_summary(transfer: Transfer, story: Plan) -> str:
    words = (
        f"{transfer.cryogen} fill: {transfer.level_before_pct:.0f} % → "
        f"{transfer.level_after_pct:.0f} %, {transfer.taken_l:.1f} L from the supply dewar"
    )
    bake = story.bake
    if bake is not None and transfer.start_s == bake.ln2_first_fill_s:
        words += "; first nitrogen after the bake-out, from warm"
    elif bake is not None and transfer.start_s == bake.lhe_first_fill_s:
        words += "; first helium after the bake-out, into the pre-cooled bath"
    return words


def _base_pressure_after(scenario: Scenario, heating_end_s: int) -> float:
    """The prep chamber gauge's median over the day a week after the heaters went off, as the
    readings log it (two significant digits, as someone would copy it into the logbook)."""
    t0 = heating_end_s + int(BASE_PRESSURE_AFTER.total_seconds())
    t = np.arange(t0 - t0 % 600, t0 + DAY, 600, dtype=np.int64)
    return float(f"{np.median(prep_pressure(scenario, t)):.2g}")


def _log_events(ctx: DemoContext, scenario: Scenario, story: Plan, events: _Events) -> None:
    since_s, now_s = int(ctx.start.timestamp()), int(ctx.now.timestamp())
    users = ctx.users
    bake = story.bake
    settled = bake is not None and (
        bake.heating_end_s + (BASE_PRESSURE_AFTER.days + 1) * DAY <= now_s
    )
    # Written once the base pressure a week later has been read.
    if bake is not None and settled and since_s <= bake.heating_start_s:
        events.add(
            InstrumentEvent.Kind.BAKEOUT,
            _at(bake.heating_start_s),
            _at(bake.heating_end_s),
            users["greta"],
            summary="bake-out of all chambers for 48 h, cryostat warm and empty",
            details={
                "zone_temperatures_k": dict(BAKE_ZONES_K),
                "base_pressure_mbar": _base_pressure_after(scenario, bake.heating_end_s),
                "base_pressure_gauge": "prep chamber ion gauge",
                "base_pressure_days_after": BASE_PRESSURE_AFTER.days,
                "notes": "gauges and filaments degassed every 10 h during the bake",
            },
        )
    emptied = [tr for tr in story.lhe + story.ln2 if tr.kind == "empty" and tr.start_s >= since_s]
    if emptied:
        first = min(emptied, key=lambda tr: tr.start_s)
        events.add(
            InstrumentEvent.Kind.MAINTENANCE,
            _at(first.start_s),
            _at(max(tr.end_s for tr in emptied)),
            users["greta"],
            summary="cryostat emptied for the bake-out: the remaining LN2 blown out of the shield",
            details={
                f"{tr.cryogen}_level_before_pct": tr.level_before_pct
                for tr in sorted(emptied, key=lambda tr: tr.cryogen)
            },
        )
    fills = [tr for tr in story.lhe + story.ln2 if tr.kind == "fill" and tr.start_s >= since_s]
    for tr in sorted(fills, key=lambda tr: tr.start_s):
        events.add(
            InstrumentEvent.Kind.CRYOGEN_TRANSFER,
            _at(tr.start_s),
            _at(tr.end_s),
            _who_fills(ctx, scenario, tr),
            summary=_fill_summary(tr, story),
            details={
                "cryogen": tr.cryogen,
                "taken_l": tr.taken_l,
                # As read off the level meter: one decimal.
                "level_before_pct": round(tr.level_before_pct, 1),
                "level_after_pct": round(tr.level_after_pct, 1),
            },
        )
    members = ("jonas", "leo", "amira", "greta")
    load_lock = ctx.instrument.chambers.filter(kind=Chamber.Kind.LOAD_LOCK).first()
    for load in story.loads:
        if load.vent_s < since_s:
            continue
        u = _rng(scenario, _TOPIC_EVENT, load.vent_s).random()
        events.add(
            InstrumentEvent.Kind.VENT,
            _at(load.vent_s),
            _at(load.pump_s),
            users[members[min(int(u * 4), 3)]],
            summary="load lock vented for a sample load",
            details={"vented_with": "N2"},
            chamber=load_lock,
        )


# --- sessions -------------------------------------------------------------------------------


@dataclass
class _DayFacts:
    """What a session's goal, summary and notes are written from."""

    session: PlannedSession
    state: SurfaceState | None
    mount: TipMount | None
    events: list[Conditioning]  # the tip's conditioning during the session
    fills: list[Transfer]  # helium fills while measuring

    @property
    def substrate(self) -> str:
        return self.session.sample.substrate

    @property
    def co_tip(self) -> bool:
        return any(
            e.kind == Conditioning.Kind.FUNCTIONALISATION and e.params.get("species") == "CO"
            for e in self.events
        )

    @property
    def force_sensor(self) -> bool:
        return self.mount is not None and bool(self.mount.tip.sensor_kind)

    @property
    def adsorbate(self) -> str:
        """The main adsorbate ("NaCl", "C60"), or "" on a clean surface."""
        if self.state is None or not self.state.coverages:
            return ""
        return max(self.state.coverages, key=lambda c: c.coverage_ml).material


class _States:
    """Surface states after each preparation, folded once per crystal (no query per day)."""

    def __init__(self, samples: Sequence[Sample]) -> None:
        self.after: dict[int, list[tuple[datetime, SurfaceState]]] = {}
        for sample in samples:
            preps = list(sample_queries.preparations_of(sample))
            states = sample_queries.surface_states_after(sample, preps)
            self.after[sample.pk] = [(p.started_at, states[p.pk]) for p in preps]

    def at(self, sample: Sample, moment: datetime) -> SurfaceState | None:
        found = None
        for started, state in self.after.get(sample.pk, []):
            if started > moment:
                break
            found = state
        return found


def _mount_at(mounts: Sequence[TipMount], moment: datetime) -> TipMount | None:
    return next((m for m in mounts if m.covers(moment)), None)


def _goal(facts: _DayFacts) -> str:
    sub, what = facts.substrate, facts.adsorbate
    thing = {"NaCl": f"NaCl/{sub} islands", "C60": f"C60/{sub}"}.get(what, f"clean {sub}")
    if facts.force_sensor:
        activity = (
            f"constant-height Δf images of {thing} with a CO tip"
            if facts.co_tip
            else f"{thing}: Δf(z) curves and tip check with the tuning fork"
        )
    elif facts.co_tip:
        activity = {
            "NaCl": f"CO tip, {thing}, dI/dV on the bilayer",
            "C60": f"CO tip, {thing}: dI/dV maps of the molecular orbitals",
        }.get(what, f"CO tip on {thing}: IETS on single CO molecules")
    else:
        activity = {
            "NaCl": f"{thing}: dI/dV on the bilayer and on the trilayer patches",
            "C60": f"{thing}: islands at the step edges, dI/dV at the LUMO",
        }.get(
            what,
            # Only the (111) faces have the occupied surface state a tip is checked on.
            f"{thing}: surface state and step edges, tip check"
            if "(111)" in sub
            else f"{thing}: step edges and adatoms, tip check",
        )
    session = facts.session
    if any(p not in session.doses for p in session.preparations):
        return f"prepare {session.sample.name}, then {activity}"
    return activity


def _summary(facts: _DayFacts, u: np.ndarray) -> str:
    topographs = 6 + int(20 * u[0])
    words = [f"{topographs} topographs"]
    if facts.force_sensor:
        words.append(f"{2 + int(6 * u[1])} Δf images")
    elif u[1] < 0.6:
        words.append(f"{1 + int(3 * u[2])} dI/dV grids")
    else:
        words.append(f"{10 + int(40 * u[2])} point spectra")
    if facts.fills:
        words.append("paused for the helium fill")
    if any(
        e.kind in (Conditioning.Kind.PULSE, Conditioning.Kind.INDENTATION) for e in facts.events
    ):
        words.append("tip reshaped on the way")
    return ", ".join(words)


def _local_hm(at: datetime, zone: ZoneInfo) -> str:
    return f"{at.astimezone(zone):%H:%M}"


def _notes_of_day(
    facts: _DayFacts, exchange: Conditioning | None, u: np.ndarray, zone: ZoneInfo
) -> list[tuple[datetime, Any, str, dict[str, Any]]]:
    """(at, author, text, about) of the day's notes; ``about`` is {"tip": …}, {"sample": …}
    or {} (a note on the session)."""
    session = facts.session
    operator = session.operator
    notes: list[tuple[datetime, Any, str, dict[str, Any]]] = []
    if exchange is not None and u[14] < 0.6:
        # The person who put the tip in says how it came up.
        p = exchange.params
        notes.append(
            (
                _minute(exchange.at + timedelta(minutes=20)),
                exchange.performed_by or operator,
                f"{exchange.tip} in from the carousel. Field emission {p['voltage_v']:.0f} V, "
                f"{p['current_a'] * 1e6:.1f} µA for {p['duration_s']:.0f} s; "
                + ("first topographs sharp, single apex." if u[15] < 0.7 else "still blunt."),
                {"tip": exchange.tip},
            )
        )
    for fill in facts.fills[:1]:
        if u[0] < 0.5:
            drift = 30 + int(60 * u[1])
            notes.append(
                (
                    _minute(_at(fill.end_s) + timedelta(minutes=5 + int(15 * u[2]))),
                    operator,
                    f"LHe fill {_local_hm(_at(fill.start_s), zone)}–"
                    f"{_local_hm(_at(fill.end_s), zone)} ({fill.level_before_pct:.0f} % → "
                    f"{fill.level_after_pct:.0f} %): stopped the grid, the drift settled "
                    f"after about {drift} min.",
                    {},
                )
            )
    # A repair that needed an indentation and two pulses gets a line on the tip.
    events = facts.events
    for k, event in enumerate(events):
        after = events[k + 1 : k + 3]
        if (
            event.kind == Conditioning.Kind.INDENTATION
            and len(after) == 2
            and all(e.kind == Conditioning.Kind.PULSE for e in after)
        ):
            notes.append(
                (
                    _minute(after[-1].at + timedelta(minutes=6)),
                    event.performed_by or operator,
                    "double tip after indentation, pulsed twice, clean again",
                    {"tip": event.tip},
                )
            )
    inside = session.end - session.measure_from
    if u[4] < 0.22:
        middle = session.measure_from + inside * (0.3 + 0.4 * u[3])
        notes.append((_minute(middle), operator, _session_remark(facts, u[5:8]), {}))
    if u[8] < 0.28:
        later = session.measure_from + inside * (0.5 + 0.4 * u[9])
        notes.append(
            (
                _minute(later),
                operator,
                _sample_remark(facts, u[10:13]),
                {"sample": session.sample},
            )
        )
    return notes


def _session_remark(facts: _DayFacts, u: np.ndarray) -> str:
    drift = 10 + int(30 * u[1])
    remarks = [
        f"z drift about {drift} pm/min after the transfer, fine two hours later."
        if facts.session.preparations
        else f"z drift about {drift} pm/min in the morning, fine by noon.",
        f"Lock-in at {3 + u[1]:.1f} kHz, {2 + int(8 * u[2])} mV rms for the dI/dV spectra.",
        "50 Hz pick-up back on the current channel; moved the preamplifier cable, gone again.",
        f"Piezo creep after the {200 + 100 * int(3 * u[1])} nm frame, waited before zooming in.",
        "Feedback noisy around noon (building vibrations?), quiet again after lunch.",
    ]
    if facts.force_sensor:
        remarks.append(
            f"Oscillation amplitude {50 + 10 * int(5 * u[1])} pm; PLL locked, Δf noise low."
        )
    return remarks[min(int(u[0] * len(remarks)), len(remarks) - 1)]


def _sample_remark(facts: _DayFacts, u: np.ndarray) -> str:
    sub = facts.substrate
    what = facts.adsorbate
    if what == "NaCl":
        options = [
            f"NaCl bilayer islands up to {20 + int(40 * u[1])} nm wide, mostly at the step "
            "edges; a few third-layer patches.",
            "Bilayer islands with straight non-polar edges; a few point defects in the NaCl.",
        ]
    elif what == "C60":
        options = [
            "C60 islands decorate the step edges; a few single molecules on the terraces.",
            f"C60 islands up to {15 + int(25 * u[1])} nm; some molecules look dim, another "
            "orientation.",
        ]
    else:
        options = [
            f"Clean terraces, about {40 + int(80 * u[1])} nm wide; a few adsorbates per "
            "100 nm², probably CO from the residual gas.",
            f"Clean {sub}: sharp step edges, very few defects.",
        ]
    return options[min(int(u[0] * len(options)), len(options) - 1)]


def load_logbook(ctx: DemoContext) -> dict[str, int]:
    """The instrument events of the readings story, the sessions of the measuring days and
    the notes written in them."""
    # load imports this module for its STEPS list, so its helper is imported here.
    from labbook.demo.load import scenario_for

    scenario = ctx.scenario or scenario_for(ctx.instrument, ctx.now)
    zone = ZoneInfo(scenario.time_zone)
    ltm = ctx.instrument
    story = plan(scenario, int(ctx.start.timestamp()), int(ctx.now.timestamp()))
    with transaction.atomic():
        events = _Events(ctx)
        _log_events(ctx, scenario, story, events)

        planned = planned_sessions(ctx, scenario)
        states = _States(list({s.sample.pk: s.sample for s in planned}.values()))
        mounts = list(tip_queries.mounts_on(ltm).order_by("start"))
        conditioning = list(
            tip_queries.conditioning_on(ltm)
            .filter(at__gte=ctx.start, at__lte=ctx.now)
            .order_by("at", "pk")
        )
        helium = [tr for tr in story.lhe if tr.kind == "fill"]
        # The field emission that followed each tip exchange, by the exchange's local day.
        first_emission: dict[date, Conditioning] = {}
        for mount in mounts:
            emission = next(
                (
                    c
                    for c in conditioning
                    if c.tip_id == mount.tip_id
                    and c.kind == Conditioning.Kind.FIELD_EMISSION
                    and mount.start <= c.at <= mount.start + timedelta(hours=3)
                ),
                None,
            )
            if emission is not None:
                first_emission[local_day(mount.start, zone)] = emission
        have_sessions = {
            (s.operator_id, s.start): s for s in Session.objects.filter(instrument=ltm)
        }
        have_notes = set(Note.objects.filter(instrument=ltm).values_list("author_id", "at"))
        new_sessions = new_notes = 0
        for session in planned:
            facts = _DayFacts(
                session=session,
                state=states.at(session.sample, session.end),
                mount=_mount_at(mounts, session.measure_from),
                events=[c for c in conditioning if session.start <= c.at <= session.end],
                fills=[
                    tr
                    for tr in helium
                    if session.measure_from <= _at(tr.start_s)
                    and _at(tr.end_s) <= session.end - timedelta(minutes=30)
                ],
            )
            u = _rng(scenario, _TOPIC_NOTE, session.day.toordinal()).random(16)
            operator = session.operator
            record = have_sessions.get((operator.pk, session.start))
            if record is None:
                record = start_session(
                    ltm,
                    start=session.start,
                    goal=_goal(facts),
                    operator=operator,
                    actor=operator,
                )
                # Closed in the evening with what came of it, as the operator would.
                end_session(record, end=session.end, summary=_summary(facts, u), actor=operator)
                have_sessions[(operator.pk, session.start)] = record
                new_sessions += 1
            exchange = first_emission.get(session.day)
            for at, author, text, about in _notes_of_day(facts, exchange, u, zone):
                if at > ctx.now or (author.pk, at) in have_notes:
                    continue
                # A note belongs to the session when its operator wrote it while it was open.
                in_session = author.pk == operator.pk and session.start <= at <= session.end
                write_note(
                    text=text,
                    at=at,
                    instrument=ltm,
                    session=record if in_session else None,
                    actor=author,
                    **about,
                )
                have_notes.add((author.pk, at))
                new_notes += 1

    counts = {
        "instrument_events": InstrumentEvent.objects.filter(instrument=ltm).count(),
        "sessions": Session.objects.filter(instrument=ltm).count(),
        "notes": Note.objects.filter(instrument=ltm).count(),
    }
    ctx.report(
        f"logbook: {counts['instrument_events']} instrument events ({events.new} new), "
        f"{counts['sessions']} sessions ({new_sessions} new), "
        f"{counts['notes']} notes ({new_notes} new)"
    )
    return counts
