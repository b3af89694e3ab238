"""The demo lab's tips on LTM-1: a handful of invented tips, when each sat in the scanner, and
everything done to their apex.

* **Tips**: etched W wires, a cut PtIr wire and one tuning-fork force sensor carrying an etched
  W tip, with its f0, Q and stiffness measured beside the nominal values (FIELD.md §2). One W
  tip is etched after the bake-out and comes in through the load lock with the first sample
  load after it.
* **Mounts**: one tip at a time. The first is in the scanner when the story begins; every two
  to five weeks someone exchanges it from the carousel first thing on a working day (the old
  tip out at about 8:00 local, the new one in a few minutes later; never on a weekend, in the
  Christmas shutdown, in the bake-out block or in the first week after it). The schedule is a
  function of the scenario alone, so every run and every window agrees on it. **The tip stays
  in through the bake-out**: the carousel is baked with the chambers anyway, and a wobble-stick
  move into a warm, empty cryostat gains nothing; instead the tip gets a field emission in the
  first session after the cool-down, since its apex spent two days at ~320 K while the walls
  outgassed.
* **Conditioning**: a field emission right after each mount (~+100 V through 100 kΩ at µA,
  FIELD.md §2); now and then, in a session, a voltage pulse (> |4| V), a gentle indentation
  (1-3 nm into the bare metal, which coats the apex with it), or a repair that needed an
  indentation and two pulses; and a CO pick-up shortly after each CO dose the samples step
  logged (the "CO for tip functionalisation" recipe), by the person who dosed.

Pulses, indentations and pick-ups happen inside the sessions of :mod:`labbook.demo.logbook`'s
day plan, by their operator. Everything goes through :mod:`labbook.tips.actions` acting as the
person who did it, and is found again by its natural key (tip name; mount tip + start;
conditioning tip + at + kind), so a second run adds nothing. Invented data only (DESIGN.md §5).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
from django.db import transaction

from labbook.demo import DemoContext
from labbook.demo.logbook import (
    PlannedSession,
    bake_day,
    is_lab_day,
    local_time,
    planned_sessions,
    story_start,
)
from labbook.demo.readings import SampleLoad, Scenario, plan
from labbook.tips import actions
from labbook.tips.models import Conditioning, Tip, TipMount

# Seed topics of their own (readings 1-3, samples 21, logbook 41-43).
_TOPIC_EXCHANGE = 31
_TOPIC_CONDITIONING = 32
# Exchanges come every two to five weeks.
EXCHANGE_DAYS = (14, 35)
# Days relative to the bake-out Monday on which no tip is exchanged: the bake-out block and
# the first week back.
BAKE_HOLD_DAYS = range(-2, 14)
# A force sensor goes in for AFM campaigns about one exchange in four.
SENSOR_SHARE = 0.25


@dataclass(frozen=True)
class TipSpec:
    name: str
    material: str
    origin: str
    identifier: str
    preparation: str
    notes: str = ""
    weight: float = 1.0  # how readily it is chosen at an exchange
    made_days_before: int = 30  # made this long before the story begins (or its arrival)
    sensor: dict[str, Any] = field(default_factory=dict)
    after_bake: bool = False  # etched after the bake-out, in with the first sample load after it


_W_ETCH = (
    "0.25 mm polycrystalline W wire, etched in 2 M NaOH at 5 V DC (drop-off method, fast "
    "cut-off); rinsed in water and ethanol, apex checked in the optical microscope"
)
TIPS: tuple[TipSpec, ...] = (
    TipSpec(
        "W-17", "W", Tip.Origin.ETCHED, "holder T1", _W_ETCH, "long, thin neck", made_days_before=58
    ),
    TipSpec(
        "W-18",
        "W",
        Tip.Origin.ETCHED,
        "holder T2",
        _W_ETCH,
        "short neck, very stable",
        made_days_before=44,
    ),
    TipSpec(
        "W-20",
        "W",
        Tip.Origin.ETCHED,
        "holder T4",
        _W_ETCH.replace("2 M NaOH", "3 M NaOH"),
        "etched in the stronger bath: blunter, but sharpens well with pulses",
        made_days_before=31,
    ),
    TipSpec(
        "PtIr-04",
        "PtIr",
        Tip.Origin.CUT,
        "holder T3",
        "0.25 mm Pt/Ir (90/10) wire cut at a shallow angle with side cutters while pulling",
        "for spectroscopy: flat density of states",
        weight=0.7,
        made_days_before=95,
    ),
    TipSpec(
        "TF-2 W",
        "W",
        Tip.Origin.ETCHED,
        "sensor holder S2",
        "tuning-fork force sensor, one prong glued to the holder; etched 50 µm W wire glued to "
        "the free prong with conductive epoxy, shortened to 0.3 mm",
        "for nc-AFM with CO tips",
        weight=0.0,  # chosen through SENSOR_SHARE
        made_days_before=120,
        sensor={
            "sensor_kind": Tip.SensorKind.TUNING_FORK,
            "resonance_frequency_hz": 24_683.0,
            "resonance_frequency_nominal_hz": 25_000.0,
            "quality_factor": 38_500.0,
            "stiffness_n_per_m": 1_930.0,
            "stiffness_nominal_n_per_m": 1_800.0,
            "stiffness_method": "thermal noise spectrum at 5 K",
        },
    ),
    TipSpec(
        "W-24",
        "W",
        Tip.Origin.ETCHED,
        "holder T5",
        _W_ETCH,
        "etched after the bake-out",
        after_bake=True,
        made_days_before=2,
    ),
)
SPECS = {spec.name: spec for spec in TIPS}


# --- the exchange schedule -------------------------------------------------------------------


@dataclass(frozen=True)
class Exchange:
    """Tip ``tip`` goes in at ``in_at`` (the previous one came out at ``out_at``), by ``by``."""

    index: int
    tip: str
    in_at: datetime
    out_at: datetime | None  # None for the first: no tip before it in the story
    by: str


def _arrival(scenario: Scenario) -> SampleLoad | None:
    """The first sample load after the bake-out: the new tip comes in with it."""
    first = bake_day(scenario) + timedelta(days=9)
    zone = ZoneInfo(scenario.time_zone)
    since = local_time(first, 0.0, zone)
    story = plan(scenario, int(since.timestamp()), int((since + timedelta(days=30)).timestamp()))
    return next((ld for ld in story.loads if ld.vent_s >= since.timestamp()), None)


def _available_from(spec: TipSpec, scenario: Scenario) -> datetime | None:
    """From when the tip is in the carousel, ready to go in (None: not in this story)."""
    if not spec.after_bake:
        return story_start(scenario)
    load = _arrival(scenario)
    # In the carousel a few hours after the lock was pumped down.
    return None if load is None else datetime.fromtimestamp(load.pump_s, UTC) + timedelta(hours=4)


def _made_at(spec: TipSpec, scenario: Scenario) -> datetime | None:
    """When it was etched or cut: an afternoon some days before it came into the vacuum."""
    ready = _available_from(spec, scenario)
    if ready is None:
        return None
    zone = ZoneInfo(scenario.time_zone)
    day = ready.astimezone(zone).date() - timedelta(days=spec.made_days_before)
    return local_time(day, 15.0, zone)


def _next_lab_day(day: date, scenario: Scenario) -> date:
    # An exchange due around the bake-out waits until the baked tip has had a week back at
    # work: the lab first sees how it came through (and flashes it, see load_tips).
    if (day - bake_day(scenario)).days in BAKE_HOLD_DAYS:
        day = bake_day(scenario) + timedelta(days=BAKE_HOLD_DAYS.stop)
    while not is_lab_day(day, scenario):
        day += timedelta(days=1)
    return day


def _exchanges_since(done: list[Exchange], name: str) -> int:
    """How many exchanges ago ``name`` last went in (never: one more than all of them)."""
    for back, exchange in enumerate(reversed(done)):
        if exchange.tip == name:
            return back
    return len(done) + 1


def exchanges(scenario: Scenario, until: datetime) -> list[Exchange]:
    """Every tip exchange of the story up to ``until``, oldest first: a function of the
    scenario only."""
    zone = ZoneInfo(scenario.time_zone)
    available = {spec.name: _available_from(spec, scenario) for spec in TIPS}
    day = story_start(scenario).astimezone(zone).date()
    out: list[Exchange] = []
    current: str | None = None
    while True:
        day = _next_lab_day(day, scenario)
        k = len(out)
        u = np.random.default_rng([scenario.seed, _TOPIC_EXCHANGE, k]).random(6)
        out_at = local_time(day, 8.0 + 0.5 * u[0], zone)
        if out_at > until:
            return out
        in_at = out_at + timedelta(minutes=6 + int(10 * u[1]))
        ready = [
            spec
            for spec in TIPS
            if spec.name != current and available[spec.name] and available[spec.name] <= in_at
        ]
        fresh = [s for s in ready if s.after_bake and not any(e.tip == s.name for e in out)]
        if fresh:
            chosen = fresh[0]  # a new tip is tried at the first exchange it can be
        elif u[2] < SENSOR_SHARE and any(s.sensor for s in ready):
            chosen = next(s for s in ready if s.sensor)
        else:
            plain = [s for s in ready if not s.sensor]
            # The tip that has rested longest in the carousel is the likeliest to go in.
            rested = [_exchanges_since(out, s.name) for s in plain]
            weights = np.array([s.weight * r for s, r in zip(plain, rested, strict=True)])
            chosen = plain[int(np.searchsorted(np.cumsum(weights) / weights.sum(), u[3]))]
        by = "amira" if u[4] < 0.5 else ("jonas" if u[4] < 0.75 else "leo")
        out.append(Exchange(k, chosen.name, in_at, out_at if out else None, by))
        current = chosen.name
        day += timedelta(days=EXCHANGE_DAYS[0] + int((EXCHANGE_DAYS[1] - EXCHANGE_DAYS[0]) * u[5]))


# --- conditioning -----------------------------------------------------------------------------


def _field_emission(u: np.ndarray) -> dict[str, str]:
    return {
        "voltage_v": "100 V",
        "current_a": f"{1 + int(3 * u[0])} uA",
        "duration_s": f"{30 * (1 + int(2 * u[1]))} s",
        "resistance_ohm": "100 kohm",
        "place": "Au foil target on the sample stage",
    }


_EMISSION_OUTCOMES = (
    "steady emission after a minute; first images sharp, single apex",
    "emission jumped between 0.5 and 2 µA, then steady; apex blunt but single",
    "clean: flat dI/dV around the Fermi level, step edges sharp",
)
_PULSE_OUTCOMES = (
    "double tip gone, step edges single again",
    "no change; indent next time",
    "resolution back: adatoms sharp",
    "tip changed, now blunt; left it to settle",
)
_INDENT_OUTCOMES = (
    "apex coated with the substrate metal: clean dI/dV, sharp adatoms",
    "stable again after the poke, slightly blunter",
)


def _pulse(u: float, v: float, place: str) -> dict[str, str]:
    volts = 4.5 + 3.5 * u
    return {
        "voltage_v": f"{'-' if v < 0.4 else ''}{volts:.1f} V",
        "duration_s": f"{(20, 50, 100)[min(int(3 * v), 2)]} ms",
        "place": place,
    }


def _indentation(u: float, substrate: str) -> dict[str, str]:
    metal = substrate.split("(")[0]
    return {
        "depth_m": f"{1.0 + 2.0 * u:.1f} nm",
        "bias_v": "50 mV",
        "place": f"bare {substrate} terrace",
        # Poking into the clean metal coats the apex with it (FIELD.md §2).
        "species": metal,
    }


def _pick_up(u: np.ndarray) -> tuple[dict[str, str], str]:
    params = {
        "species": "CO",
        "bias_v": f"{2.2 + 0.6 * u[0]:.1f} V",
        "setpoint_a": "10 pA",
        "method": "tip held over a single CO molecule, bias raised until the current jumped",
        "verified_by": "CO molecules now image as rings with a dark centre",
    }
    tries = 1 + int(3 * u[1])
    outcome = (
        "CO on the apex at the first try"
        if tries == 1
        else f"CO on the apex after {tries} tries; the first went back to the surface"
    )
    return params, outcome


@dataclass
class _Writer:
    ctx: DemoContext
    have: set[tuple[int, datetime, str]]
    new: int = 0

    def condition(
        self,
        tip: Tip,
        kind: str,
        at: datetime,
        params: dict[str, str],
        outcome: str,
        actor,
    ) -> None:
        at = at.replace(microsecond=0)
        if at > self.ctx.now or (tip.pk, at, kind) in self.have:
            return
        actions.record_conditioning(
            tip, kind=kind, at=at, params=params, outcome=outcome, actor=actor
        )
        self.have.add((tip.pk, at, kind))
        self.new += 1


def _in_session(
    writer: _Writer,
    scenario: Scenario,
    session: PlannedSession,
    tip: Tip,
) -> None:
    """The session's conditioning: a reshaping now and then (before any CO dose, so the CO
    picked up later survives) and a pick-up after each dose."""
    key = [scenario.seed, _TOPIC_CONDITIONING, session.day.toordinal()]
    u = np.random.default_rng(key).random(12)
    operator = session.operator
    substrate = session.sample.substrate
    doses = session.doses
    zone = ZoneInfo(scenario.time_zone)
    if u[0] < 0.3:
        earliest = max(
            session.measure_from + timedelta(minutes=30), local_time(session.day, 11, zone)
        )
        latest = session.end - timedelta(hours=1)
        if doses:
            latest = min(latest, doses[0].started_at - timedelta(minutes=15))
        if earliest < latest:
            at = earliest + (latest - earliest) * u[1]
            at = at.replace(second=0)
            place = f"over a bare {substrate} terrace"
            if u[2] < 0.4:
                params = _pulse(u[3], u[4], place)
                outcome = _PULSE_OUTCOMES[
                    min(int(u[5] * len(_PULSE_OUTCOMES)), len(_PULSE_OUTCOMES) - 1)
                ]
                writer.condition(tip, Conditioning.Kind.PULSE, at, params, outcome, operator)
            elif u[2] < 0.7:
                params = _indentation(u[3], substrate)
                outcome = _INDENT_OUTCOMES[int(u[5] < 0.5)]
                writer.condition(tip, Conditioning.Kind.INDENTATION, at, params, outcome, operator)
            else:
                writer.condition(
                    tip,
                    Conditioning.Kind.INDENTATION,
                    at,
                    _indentation(u[3], substrate),
                    "double tip after it: every adatom twice",
                    operator,
                )
                writer.condition(
                    tip,
                    Conditioning.Kind.PULSE,
                    at + timedelta(minutes=8),
                    _pulse(u[6], u[4], place),
                    "still double",
                    operator,
                )
                writer.condition(
                    tip,
                    Conditioning.Kind.PULSE,
                    at + timedelta(minutes=13),
                    _pulse(u[7], u[4], place),
                    "single apex again, clean",
                    operator,
                )
    for dose in doses:
        params, outcome = _pick_up(u[8:10])
        at = (dose.ended_at or dose.started_at) + timedelta(minutes=10 + int(20 * u[10]))
        # Whoever dosed picks the CO up.
        writer.condition(
            tip,
            Conditioning.Kind.FUNCTIONALISATION,
            at.replace(second=0),
            params,
            outcome,
            dose.operator,
        )


def load_tips(ctx: DemoContext) -> dict[str, int]:
    """The tips, their mounting periods in the demo window and their conditioning."""
    # load imports this module for its STEPS list, so its helper is imported here.
    from labbook.demo.load import scenario_for

    scenario = ctx.scenario or scenario_for(ctx.instrument, ctx.now)
    ltm, users = ctx.instrument, ctx.users
    since = max(ctx.start, story_start(scenario))
    with transaction.atomic():
        tips: dict[str, Tip] = {t.name: t for t in Tip.objects.filter(name__in=SPECS)}
        new_tips = 0
        for spec in TIPS:
            if spec.name in tips:
                continue
            tips[spec.name] = actions.create_tip(
                name=spec.name,
                material=spec.material,
                origin=spec.origin,
                identifier=spec.identifier,
                preparation=spec.preparation,
                prepared_at=_made_at(spec, scenario),
                notes=spec.notes,
                actor=users["amira"],  # the postdoc looks after the tips
                **spec.sensor,
            )
            new_tips += 1

        # Mounting periods that reach into the window, each ending where the next exchange
        # took it out (or open, if that is after "now").
        schedule = exchanges(scenario, ctx.now)
        periods = []
        for k, exchange in enumerate(schedule):
            following = schedule[k + 1] if k + 1 < len(schedule) else None
            end = None if following is None else following.out_at
            periods.append((exchange, end, following))
        existing = {(m.tip_id, m.start): m for m in TipMount.objects.filter(instrument=ltm)}
        new_mounts = 0
        for exchange, end, following in periods:
            tip = tips[exchange.tip]
            mount = existing.get((tip.pk, exchange.in_at))
            if mount is not None:
                if mount.end is None and end is not None:
                    # Open at an earlier run's "now"; the next exchange has taken it out since.
                    actions.unmount_tip(mount, end=end, actor=users[following.by])
                continue
            if end is not None and end <= since:
                continue  # over before the window: not part of this demo
            actions.mount_tip(
                tip,
                ltm,
                start=exchange.in_at,
                end=end,
                # Periods end at their own out time (given here, or closed above), never at
                # the next one's start, so mounting must not move an open one's end.
                close_previous=False,
                notes=f"from the carousel, slot {list(SPECS).index(exchange.tip) + 1}",
                actor=users[exchange.by],
            )
            new_mounts += 1

        writer = _Writer(
            ctx,
            set(Conditioning.objects.filter(instrument=ltm).values_list("tip_id", "at", "kind")),
        )
        for exchange, end, _ in periods:
            if end is not None and end <= since:
                continue
            # The exchange's own generator, past the six values the schedule drew from it.
            u = np.random.default_rng([scenario.seed, _TOPIC_EXCHANGE, exchange.index]).random(10)
            outcome = _EMISSION_OUTCOMES[min(int(u[9] * len(_EMISSION_OUTCOMES)), 2)]
            writer.condition(
                tips[exchange.tip],
                Conditioning.Kind.FIELD_EMISSION,
                (exchange.in_at + timedelta(minutes=25 + int(20 * u[6]))).replace(second=0),
                _field_emission(u[7:9]),
                outcome,
                users[exchange.by],
            )

        def exchange_at(at: datetime) -> Exchange:
            return next(e for e in reversed(schedule) if e.in_at <= at)

        def tip_at(at: datetime) -> Tip:
            return tips[exchange_at(at).tip]

        sessions = planned_sessions(ctx, scenario)
        story = plan(scenario, int(ctx.start.timestamp()), int(ctx.now.timestamp()))
        bake = story.bake
        if bake is not None:
            back = next(
                (s for s in sessions if s.measure_from.timestamp() >= bake.lhe_first_fill_s), None
            )
            at = None if back is None else (back.measure_from + timedelta(minutes=20))
            # Only for the tip that was baked: one exchanged on the first day back has just
            # had its own field emission.
            if at is not None and exchange_at(at).in_at.timestamp() < bake.heating_start_s:
                at = at.replace(second=0)
                writer.condition(
                    tip_at(at),
                    Conditioning.Kind.FIELD_EMISSION,
                    at,
                    _field_emission(np.array([0.9, 0.9])),
                    "first field emission after the bake-out: noisy for five minutes, "
                    "then steady; apex clean",
                    back.operator,
                )
        for session in sessions:
            _in_session(writer, scenario, session, tip_at(session.measure_from))

    counts = {
        "tips": Tip.objects.filter(name__in=SPECS).count(),
        "tip_mounts": TipMount.objects.filter(instrument=ltm).count(),
        "conditioning": Conditioning.objects.filter(instrument=ltm).count(),
    }
    ctx.report(
        f"tips: {counts['tips']} tips ({new_tips} new), {counts['tip_mounts']} mounts "
        f"({new_mounts} new), {counts['conditioning']} conditioning events ({writer.new} new)"
    )
    return counts
