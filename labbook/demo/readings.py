"""Invented but physically plausible logger values for the demo microscope LTM-1.

Pure numpy (and the standard library's zoneinfo): nothing here imports Django, so the story can
be tested, plotted or benchmarked on its own.

Every value is a function of the absolute instant (UTC seconds since the epoch) and of the
:class:`Scenario` — never of the window that was asked for. A later ``demo`` run that extends
the window (a day later, or with a larger ``--days``) therefore continues the same story without
a jump at the seam, and generating only the missing span gives the same numbers as generating
everything. Random choices come from a generator seeded by (seed, topic, day) and sample noise
from a counter-based hash of (seed, series, t), which is what makes that possible.

The story (FIELD.md §3 and §4, REFERENCES.md §8):

* the preparation chamber idles at 1–3e-10 mbar, creeping up slowly between bake-outs, with
  Ar sputter / anneal cycles on about half the working days (gauge reads ~5e-6 mbar for 20–30
  min), the occasional deposition, and a small bump whenever a sample comes through;
* the microscope chamber sits at ~3e-11 mbar while the cryostat is cold (cryopumping) and a
  few 1e-10 when it is warm;
* the load lock sits at 1e-8–1e-7 mbar and is vented to atmosphere (~1000 mbar) about twice a
  week when samples are loaded, then pumped down again;
* the bath cryostat: LN2 shield filled every working day, LHe bath on Monday, Wednesday and
  Friday (LN2 first), both back to ~95 %, between 9:00 and 17:00 local time; the helium level
  meter is read every 30 min because its heater adds boil-off. On the lab's one cryogen
  holiday (a Wednesday, :func:`cryo_holiday`) nobody fills: the helium fill moves to the
  Thursday. For one week (:func:`raised_boiloff_week`) the isolation vacuum is degraded and
  the baths boil off faster (LHe ×1.45, LN2 ×1.3) until it is re-pumped on the Friday
  morning (FIELD.md §3: re-pump when the boil-off is up by more than 30 %); the STM head stays at
  4.4–4.6 K and warms by a fraction of a kelvin for about an hour after each helium transfer;
* once, the system is baked: the cryostat is let run dry and emptied, the chambers are baked
  for 48 h with the cryostat warm (~295 K) and empty, the prep pressure rises into 1e-5 mbar
  and then falls over days to a lower base, and the cryostat is cooled down again.
"""

from __future__ import annotations

import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from functools import lru_cache
from zoneinfo import ZoneInfo

import numpy as np

MINUTE = 60
HOUR = 3600
DAY = 86400

# Gas at 15 °C from one litre of liquid helium lost: (ρ_l − ρ_v)/ρ_gas = 637 L, not the 737 L
# expansion ratio, because the vapour left behind fills the vacated volume (REFERENCES.md §1).
HE_GAS_L_PER_LIQUID_L = 637.0
# The demo lab's recovery line returns most but not all of it (invented: leaks, purges).
HE_RECOVERED_FRACTION = 0.88

# The history the plan starts from before the first instant asked for. It must span the
# longest stretch without a helium fill (the bake-out: ~12 days), so that the level at the
# first instant is set by a fill in the plan and not by the plan's arbitrary starting level.
LEAD_IN_DAYS = 21

# Days relative to the bake-out Monday (day 0).
_NO_LHE_FILL = range(-4, 7)  # last regular helium fill on the Wednesday before (day -5)
_NO_LN2_FILL = range(-2, 7)  # last regular nitrogen fill on the Friday before (day -3)
_NO_WORK = range(-2, 9)  # no preparations and no sample loading around the bake-out


@dataclass(frozen=True)
class Scenario:
    """What the demo story depends on. ``bake_start_s`` (UTC seconds) is the Monday the
    bake-out week begins; :func:`bake_start_for` derives it from the start of the demo data."""

    bake_start_s: int
    seed: int = 4512
    time_zone: str = "Europe/Berlin"
    lhe_capacity_l: float = 12.0
    # 3.0 L/day ≈ 90 mW into the bath: a 95 % fill on Friday leaves ~20 % on Monday morning.
    lhe_boiloff_l_per_day: float = 3.0
    ln2_capacity_l: float = 24.0
    ln2_boiloff_l_per_day: float = 5.3


@dataclass(frozen=True)
class Transfer:
    """One cryogen event: a fill (level rises to ``level_after_pct``) or, once, the LN2 shield
    being emptied for the bake-out (``kind == "empty"``). ``taken_l`` is the liquid drawn from
    the supply dewar: what reached the bath plus the transfer loss."""

    cryogen: str  # "LHe" or "LN2"
    kind: str  # "fill" or "empty"
    start_s: int
    end_s: int
    level_before_pct: float
    level_after_pct: float
    loss_fraction: float
    taken_l: float


@dataclass(frozen=True)
class Episode:
    """Something that raised a chamber's pressure for a while: ``kind`` is ``sputter`` (Ar),
    ``anneal``, ``deposit``, ``transfer`` (sample moved prep → microscope) or ``load_transfer``
    (sample moved load lock → prep). ``pressure_mbar`` is the plateau the N2-calibrated gauge
    reads above base, as an operator would note it."""

    kind: str
    start_s: int
    end_s: int
    pressure_mbar: float
    gas: str = ""


@dataclass(frozen=True)
class SampleLoad:
    """The load lock vented to atmosphere at ``vent_s`` and pumped again from ``pump_s``."""

    vent_s: int
    pump_s: int


@dataclass(frozen=True)
class BakeOut:
    """The year's bake-out, as instants (UTC seconds)."""

    lhe_empty_s: int  # the helium bath has boiled dry
    ln2_emptied_s: int  # the remaining LN2 is blown out of the shield
    heating_start_s: int
    heating_end_s: int
    ln2_first_fill_s: int  # cool-down starts with nitrogen (shield and pre-cooling the bath)
    lhe_first_fill_s: int


@dataclass
class _Level:
    """A bath level as piecewise-linear segments: linear during a transfer, linear boil-off
    after it. Arrays are per event, in time order."""

    start: np.ndarray
    end: np.ndarray
    before: np.ndarray
    after: np.ndarray
    rate_pct_per_s: np.ndarray  # boil-off after the event, until the next one

    def at(self, t: np.ndarray) -> np.ndarray:
        i = np.searchsorted(self.start, t, side="right") - 1
        j = np.clip(i, 0, None)
        in_transfer = t < self.end[j]
        span = np.maximum(self.end[j] - self.start[j], 1)
        during = self.before[j] + (self.after[j] - self.before[j]) * (t - self.start[j]) / span
        boiling = self.after[j] - self.rate_pct_per_s[j] * (t - self.end[j])
        level = np.where(in_transfer, during, boiling)
        level = np.where(i < 0, self.before[0], level)
        return np.clip(level, 0.0, 100.0)


@dataclass
class Plan:
    """All events of the story between two days (inclusive), with the lead-in history."""

    lhe: list[Transfer] = field(default_factory=list)
    ln2: list[Transfer] = field(default_factory=list)
    episodes: list[Episode] = field(default_factory=list)
    loads: list[SampleLoad] = field(default_factory=list)
    bake: BakeOut | None = None
    lhe_level: _Level | None = None
    ln2_level: _Level | None = None


# --- time -----------------------------------------------------------------------------------


def _utc_seconds(moment: datetime) -> int:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError("an aware datetime is needed (UTC or with a zone), not a naive one")
    return int(moment.timestamp())


def time_grid(start: datetime, end: datetime, interval_s: int) -> np.ndarray:
    """The logger's instants in [start, end]: whole multiples of ``interval_s`` since the
    epoch (UTC seconds, int64), so every run lands on the same instants and a re-run can tell
    which ones it already has."""
    if interval_s <= 0:
        raise ValueError("interval_s must be positive")
    first = -(-_utc_seconds(start) // interval_s) * interval_s
    last = (_utc_seconds(end) // interval_s) * interval_s
    return np.arange(first, last + 1, interval_s, dtype=np.int64)


def bake_start_for(anchor: datetime, time_zone: str = "Europe/Berlin") -> int:
    """The bake-out Monday, 08:00 local time, on or after ``anchor`` + 150 days: with a year of
    demo data the system was baked about seven months ago and is clean and cold today."""
    zone = ZoneInfo(time_zone)
    day = (anchor.astimezone(zone) + timedelta(days=150)).date()
    day += timedelta(days=(7 - day.weekday()) % 7)
    return _local_seconds(day, 8.0, zone)


def _local_seconds(day: date, hours: float, zone: ZoneInfo) -> int:
    # Adding a timedelta to an aware datetime is wall-clock arithmetic; events are between
    # 8:00 and 18:00, far from the 2:00–3:00 daylight-saving switch, so this is unambiguous.
    midnight = datetime(day.year, day.month, day.day, tzinfo=zone)
    return int((midnight + timedelta(hours=hours)).timestamp())


# --- randomness -----------------------------------------------------------------------------

_TOPIC_CRYO, _TOPIC_PREP, _TOPIC_LOAD = 1, 2, 3
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def _day_rng(seed: int, topic: int, ordinal: int) -> np.random.Generator:
    """One generator per (topic, day): a day's choices do not depend on which other days or
    topics were generated, nor in which order."""
    return np.random.default_rng([seed, topic, ordinal])


def _mix(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser on uint64 arrays (wrapping arithmetic is intended)."""
    x = x + _GOLDEN
    x = (x ^ (x >> np.uint64(30))) * _M1
    x = (x ^ (x >> np.uint64(27))) * _M2
    return x ^ (x >> np.uint64(31))


def _salt(seed: int, name: str) -> np.uint64:
    key = np.array([(seed & 0xFFFFFFFF) << 32 | zlib.crc32(name.encode())], dtype=np.uint64)
    return _mix(key)[0]


def _uniform(seed: int, name: str, keys: np.ndarray) -> np.ndarray:
    bits = _mix(keys.astype(np.uint64) ^ _salt(seed, name))
    return ((bits >> np.uint64(11)).astype(np.float64) + 0.5) * (1.0 / 2**53)


def white(seed: int, name: str, t: np.ndarray) -> np.ndarray:
    """Standard-normal noise that is a pure function of (seed, name, t) (Box–Muller)."""
    u1 = _uniform(seed, name + "/1", t)
    u2 = _uniform(seed, name + "/2", t)
    return np.sqrt(-2.0 * np.log(u1)) * np.cos(2.0 * np.pi * u2)


def smooth(seed: int, name: str, t: np.ndarray, knot_s: int) -> np.ndarray:
    """Slowly wandering noise (values at knots every ``knot_s``, cosine-interpolated), for
    drifts like the weather's pull on the bath temperature. Roughly unit variance."""
    k = np.floor_divide(t, knot_s)
    frac = (t - k * knot_s) / knot_s
    w = 0.5 - 0.5 * np.cos(np.pi * frac)
    a = white(seed, name, k)
    b = white(seed, name, k + 1)
    return (a * (1.0 - w) + b * w) * 1.3


# --- the plan of events ----------------------------------------------------------------------


def _is_shutdown(day: date) -> bool:
    """Between Christmas and New Year nobody prepares samples; the cryostat is still filled."""
    return (day.month == 12 and day.day >= 24) or (day.month == 1 and day.day == 1)


def _bake_day(scenario: Scenario) -> date:
    zone = ZoneInfo(scenario.time_zone)
    return datetime.fromtimestamp(scenario.bake_start_s, UTC).astimezone(zone).date()


def _heating_end_s(scenario: Scenario) -> int:
    day = _bake_day(scenario) + timedelta(days=3)
    return _local_seconds(day, 9.0, ZoneInfo(scenario.time_zone))


#: Boil-off factors in the week of the degraded isolation vacuum (LHe, LN2). LHe at ×1.45 is
#: well above the 30 % a lab acts on; a 95 % fill still lasts the two days between fills.
RAISED_BOILOFF = {"LHe": 1.45, "LN2": 1.3}


def cryo_holiday(scenario: Scenario) -> date:
    """The lab's cryogen holiday: the first Wednesday ten weeks after the bake-out Monday (an
    invented institute day). Midweek, so a 12 L bath bridges it with the Thursday fill."""
    return _bake_day(scenario) + timedelta(days=72)


def raised_boiloff_week(scenario: Scenario) -> tuple[date, date]:
    """(Monday, Friday) of the week with the degraded isolation vacuum: sixteen weeks after the
    bake-out Monday. The boil-off is raised from the Monday fill until the Friday re-pump."""
    monday = _bake_day(scenario) + timedelta(days=112)
    return monday, monday + timedelta(days=4)


@lru_cache(maxsize=32)
def _plan_days(scenario: Scenario, first: int, last: int) -> Plan:
    zone = ZoneInfo(scenario.time_zone)
    bake_day = _bake_day(scenario)
    bake_ordinal = bake_day.toordinal()
    holiday = cryo_holiday(scenario)
    raised_from, raised_until = raised_boiloff_week(scenario)
    raised = (_local_seconds(raised_from, 0.0, zone), _local_seconds(raised_until, 0.0, zone))
    cryo_events: list[tuple[str, str, int, int, float, float]] = []  # cryogen, kind, ...
    episodes: list[Episode] = []
    loads: list[SampleLoad] = []
    lhe_first_fill_s = 0
    for ordinal in range(first, last + 1):
        day = date.fromordinal(ordinal)
        rel = ordinal - bake_ordinal
        working = day.weekday() < 5
        # No cryogen transfer on the holiday; the helium fill moves to the next day.
        fills_cryogen = working and day != holiday
        lhe_day = day.weekday() in (0, 2, 4) or day == holiday + timedelta(days=1)
        u = _day_rng(scenario.seed, _TOPIC_CRYO, ordinal).random(8)
        # Nitrogen first, then helium (FIELD.md §3): the shield is topped up every working
        # day, mostly in the morning.
        ln2_hour = 9.25 + 1.75 * u[0] if u[1] > 0.15 else 13.5 + 2.0 * u[0]
        ln2_start = _local_seconds(day, ln2_hour, zone)
        ln2_end = ln2_start + int((15 + 10 * u[2]) * MINUTE)
        if rel == 0:
            # Bake-out Monday: whatever is left in the cryostat is blown out.
            blow_out = (_local_seconds(day, 9.0, zone), _local_seconds(day, 10.0, zone))
            cryo_events.append(("LN2", "empty", *blow_out, 0.0, 0.0))
            cryo_events.append(("LHe", "empty", *blow_out, 0.0, 0.0))
        elif rel == 4:
            # First nitrogen from warm: much boils off cooling the shield, so it ends lower.
            start = _local_seconds(day, 10.0, zone)
            cryo_events.append(("LN2", "fill", start, start + 90 * MINUTE, 80.0, 0.45))
        elif fills_cryogen and rel not in _NO_LN2_FILL:
            target = 93.0 + 4.0 * u[3]
            cryo_events.append(("LN2", "fill", ln2_start, ln2_end, target, 0.1 + 0.1 * u[4]))
        if rel == 7:
            # First helium into the nitrogen-pre-cooled bath (the LN2 is blown out first):
            # a long transfer that loses nearly half the liquid and ends at ~70 %.
            start = ln2_end + 60 * MINUTE
            lhe_first_fill_s = start
            cryo_events.append(("LHe", "fill", start, start + 75 * MINUTE, 70.0, 0.45))
        elif fills_cryogen and lhe_day and rel not in _NO_LHE_FILL:
            start = ln2_end + int((20 + 25 * u[5]) * MINUTE)
            end = start + int((25 + 15 * u[6]) * MINUTE)
            # Top-ups lose 10–30 % of the liquid to the siphon and flash gas (FIELD.md §3).
            cryo_events.append(("LHe", "fill", start, end, 93.0 + 4.0 * u[7], 0.12 + 0.16 * u[4]))
        if working and not _is_shutdown(day) and rel not in _NO_WORK:
            episodes.extend(_prep_day(scenario, day, ordinal, zone))
            load = _load_day(scenario, day, ordinal, zone)
            if load is not None:
                loads.append(load)
                # The sample goes on into the prep chamber once the lock is down to ~1e-6.
                moved = load.pump_s + int(2.5 * HOUR)
                episodes.append(Episode("load_transfer", moved, moved + 10 * MINUTE, 1.0e-9))
    episodes.sort(key=lambda e: e.start_s)
    result = Plan(episodes=episodes, loads=loads)
    for cryogen, capacity, rate_l in (
        ("LHe", scenario.lhe_capacity_l, scenario.lhe_boiloff_l_per_day),
        ("LN2", scenario.ln2_capacity_l, scenario.ln2_boiloff_l_per_day),
    ):
        events = sorted((e for e in cryo_events if e[0] == cryogen), key=lambda e: e[2])
        if not events:
            continue
        transfers, level = _run_level(
            scenario.seed,
            cryogen,
            events,
            capacity,
            rate_l,
            raised=(*raised, RAISED_BOILOFF[cryogen]),
        )
        if cryogen == "LHe":
            result.lhe, result.lhe_level = transfers, level
        else:
            result.ln2, result.ln2_level = transfers, level
    if first <= bake_ordinal - 7 and last >= bake_ordinal + 7 and result.lhe_level is not None:
        result.bake = _bake_out(result, bake_day, zone, lhe_first_fill_s)
    return result


def _run_level(
    seed: int,
    cryogen: str,
    events: list[tuple],
    capacity_l: float,
    rate_l_per_day: float,
    *,
    raised: tuple[int, int, float] | None = None,
) -> tuple[list[Transfer], _Level]:
    """Walk the events in order: each fill goes to its target level whatever the level before
    (so the story does not depend on where the plan started), boil-off is linear in between
    (FIELD.md §3) with a few per cent of variation from one interval to the next. ``raised``
    (start_s, end_s, factor) multiplies the boil-off after the events that start in it."""
    n = len(events)
    start = np.array([e[2] for e in events], dtype=np.int64)
    end = np.array([e[3] for e in events], dtype=np.int64)
    after = np.array([e[4] for e in events], dtype=np.float64)
    jitter = 1.0 + 0.04 * white(seed, cryogen + "/rate", start)
    rate = rate_l_per_day / capacity_l * 100.0 / DAY * jitter
    if raised is not None:
        rate = np.where((start >= raised[0]) & (start < raised[1]), rate * raised[2], rate)
    before = np.empty(n)
    level = 50.0  # arbitrary: the lead-in makes it irrelevant to the instants asked for
    transfers = []
    for i, event in enumerate(events):
        if i:
            level = max(after[i - 1] - rate[i - 1] * (start[i] - end[i - 1]), 0.0)
        before[i] = level
        loss = event[5]
        gained_l = max(after[i] - level, 0.0) / 100.0 * capacity_l
        taken = gained_l / (1.0 - loss) if event[1] == "fill" else 0.0
        transfers.append(
            Transfer(
                cryogen,
                event[1],
                int(start[i]),
                int(end[i]),
                round(float(level), 1),
                float(after[i]),
                float(loss),
                round(taken, 2),
            )
        )
    return transfers, _Level(start, end, before, after, rate)


def _prep_day(scenario: Scenario, day: date, ordinal: int, zone: ZoneInfo) -> list[Episode]:
    """About half the working days see 1–3 sputter/anneal cycles from mid-morning, sometimes
    a deposition, then the sample goes to the microscope."""
    rng = _day_rng(scenario.seed, _TOPIC_PREP, ordinal)
    u = rng.random(40)
    if u[0] > 0.55:
        return []
    cycles = 1 + int(u[1] > 0.3) + int(u[1] > 0.75)
    t = _local_seconds(day, 9.5 + 1.5 * u[2], zone)
    out = []
    for c in range(cycles):
        v = u[3 + 6 * c : 9 + 6 * c]
        sputter = int((20 + 10 * v[0]) * MINUTE)
        # The leak valve is set by the N2-calibrated gauge: ~5e-6 mbar as read (Ar's true
        # pressure is 0.8 × the reading, FIELD.md §4 — corrections belong to the science code).
        out.append(Episode("sputter", t, t + sputter, float(10 ** (-5.52 + 0.42 * v[1])), "Ar"))
        t += sputter + int((3 + 5 * v[2]) * MINUTE)
        anneal = int((10 + 10 * v[3]) * MINUTE)
        out.append(Episode("anneal", t, t + anneal, float(10 ** (-9.1 + 0.7 * v[4]))))
        t += anneal + int((10 + 15 * v[5]) * MINUTE)
    if u[30] < 0.35:
        t += int((10 + 40 * u[31]) * MINUTE)
        duration = int((5 + 10 * u[32]) * MINUTE)
        out.append(Episode("deposit", t, t + duration, float(10 ** (-9.5 + 0.7 * u[33]))))
        t += duration
    t += int((30 + 60 * u[34]) * MINUTE)
    out.append(Episode("transfer", t, t + 5 * MINUTE, 4.0e-10))
    return out


def _load_day(scenario: Scenario, day: date, ordinal: int, zone: ZoneInfo) -> SampleLoad | None:
    """About 30 % of working days (1–2 a week) someone loads samples through the load lock."""
    u = _day_rng(scenario.seed, _TOPIC_LOAD, ordinal).random(3)
    if u[0] > 0.3:
        return None
    vent = _local_seconds(day, 9.0 + 6.5 * u[1], zone)
    return SampleLoad(vent, vent + int((10 + 15 * u[2]) * MINUTE))


def _bake_out(result: Plan, bake_day: date, zone: ZoneInfo, lhe_first_fill_s: int) -> BakeOut:
    emptied = _local_seconds(bake_day, 9.0, zone)
    # The helium left after the last fill before the bake boils away (with the default
    # boil-off, early on the Sunday); what would be left on Monday morning is blown out.
    last_fill = [tr for tr in result.lhe if tr.kind == "fill" and tr.start_s < emptied][-1]
    rate = result.lhe_level.rate_pct_per_s[result.lhe.index(last_fill)]
    lhe_empty = min(int(last_fill.end_s + last_fill.level_after_pct / rate), emptied)
    return BakeOut(
        lhe_empty_s=lhe_empty,
        ln2_emptied_s=emptied,
        heating_start_s=_local_seconds(bake_day + timedelta(days=1), 9.0, zone),
        heating_end_s=_local_seconds(bake_day + timedelta(days=3), 9.0, zone),
        ln2_first_fill_s=_local_seconds(bake_day + timedelta(days=4), 10.0, zone),
        lhe_first_fill_s=lhe_first_fill_s,
    )


def plan(scenario: Scenario, start_s: int, end_s: int) -> Plan:
    """Every event of the story that matters for instants in [start_s, end_s] (UTC seconds):
    cryogen transfers, preparation episodes, sample loads and the bake-out if it is near.
    Later demo steps (refill logs, preparations) read the same plan so records and readings
    agree. The lists start up to LEAD_IN_DAYS before ``start_s`` (filter by time), and the
    plan is cached and shared: treat it as read-only."""
    zone = ZoneInfo(scenario.time_zone)
    first = datetime.fromtimestamp(int(start_s), UTC).astimezone(zone).date().toordinal()
    last = datetime.fromtimestamp(int(end_s), UTC).astimezone(zone).date().toordinal()
    first, last = first - LEAD_IN_DAYS, last + 1
    bake = _bake_day(scenario).toordinal()
    # Anywhere near the bake-out (its pressure tail lasts weeks), plan all of it, so the
    # bake's instants are the same whichever window asked.
    if first <= bake + 40 and last >= bake - 7:
        first, last = min(first, bake - 7 - LEAD_IN_DAYS), max(last, bake + 9)
    return _plan_days(scenario, first, last)


def _plan_for(scenario: Scenario, t: np.ndarray) -> Plan:
    if t.size == 0:
        return Plan()
    return plan(scenario, int(t.min()), int(t.max()))


# --- shapes -----------------------------------------------------------------------------------


def _add_pulse(
    out: np.ndarray,
    t: np.ndarray,
    start: int,
    end: int,
    height: float,
    rise_s: float,
    fall_s: float,
) -> None:
    """Add, in place, a plateau of ``height`` from start to end with an exponential rise and
    an exponential fall after it — how a pressure follows a leak valve or a heater. Touches
    only the slice of the (sorted) instants it reaches."""
    lo = int(np.searchsorted(t, start, side="left"))
    hi = int(np.searchsorted(t, end + 8 * fall_s, side="right"))
    if lo >= hi:
        return
    ts = t[lo:hi]
    at_end = height * (1.0 - np.exp(-(end - start) / rise_s))
    during = height * (1.0 - np.exp(-(ts - start) / rise_s))
    after = at_end * np.exp(-(ts - end) / fall_s)
    out[lo:hi] += np.where(ts <= end, during, after)


def _relax(
    t: np.ndarray,
    value: np.ndarray,
    start_value: float,
    segments: list[tuple[int, float | None, float]],
    until: int,
    cold: Callable[[np.ndarray], np.ndarray],
) -> np.ndarray:
    """Overwrite ``value`` between the first segment's start and ``until`` with exponential
    relaxations: each segment (t0, target, tau) relaxes from where the previous one left off
    towards its target; a target of None means back to the ``cold`` model (the last segment)."""
    out = value.copy()
    v = start_value
    for k, (t0, target, tau) in enumerate(segments):
        t1 = segments[k + 1][0] if k + 1 < len(segments) else until
        sel = (t >= t0) & (t < t1)
        if target is None:
            ts = t[sel]
            out[sel] = cold(ts) + (v - cold(np.array([t0]))[0]) * np.exp(-(ts - t0) / tau)
            v = float(cold(np.array([t1]))[0])
        else:
            out[sel] = target + (v - target) * np.exp(-(t[sel] - t0) / tau)
            v = target + (v - target) * float(np.exp(-(t1 - t0) / tau))
    return out


def _round_significant(x: np.ndarray, digits: int) -> np.ndarray:
    """Gauge controllers report a mantissa of a few digits ("2.34E-10")."""
    exponent = np.floor(np.log10(np.abs(x)))
    scale = 10.0 ** (digits - 1 - exponent)
    return np.round(x * scale) / scale


# --- the series -------------------------------------------------------------------------------


def lhe_level(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Helium bath level, % of the meter's active length (taken here as linear in volume)."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    if p.lhe_level is None:
        return np.zeros(t.shape)
    true = p.lhe_level.at(t)
    # A dry meter reads exactly zero; a wet one carries a little read-out noise.
    level = np.where(true > 0.0, true + 0.25 * white(scenario.seed, "lhe_level", t), 0.0)
    return np.round(np.clip(level, 0.0, 100.0), 1)


def ln2_level(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Nitrogen shield level, %."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    if p.ln2_level is None:
        return np.zeros(t.shape)
    true = p.ln2_level.at(t)
    # A dry meter reads exactly zero; a wet one carries a little read-out noise.
    level = np.where(true > 0.0, true + 0.3 * white(scenario.seed, "ln2_level", t), 0.0)
    return np.round(np.clip(level, 0.0, 100.0), 1)


def _head_cold(scenario: Scenario, p: Plan, t: np.ndarray) -> np.ndarray:
    # The bath follows the recovery line's pressure, which follows the weather: a slow
    # ±0.03 K wander around 4.47 K, a few mK of sensor noise.
    seed = scenario.seed
    temp = 4.47 + 0.025 * smooth(seed, "head/weather", t, 2 * DAY) + 0.003 * white(seed, "head", t)
    for tr in p.lhe:
        # Warm gas from the siphon: the head warms during a transfer and recovers within ~1 h.
        size = 0.4 + 0.4 * float(_uniform(seed, "head/bump", np.array([tr.start_s]))[0])
        _add_pulse(temp, t, tr.start_s, tr.end_s, size, 8 * MINUTE, 20 * MINUTE)
    return temp


def head_temperature(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """STM head temperature, K: ~4.5 K while the bath holds helium; during the bake-out it
    goes to the shield's ~80 K, then room temperature, a little above it under the bake, and
    back down with nitrogen and then helium."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    temp = _head_cold(scenario, p, t)
    if p.bake is not None:
        b = p.bake
        temp = _relax(
            t,
            temp,
            4.47,
            [
                (b.lhe_empty_s, 80.0, 5 * HOUR),
                (b.ln2_emptied_s, 295.0, 10 * HOUR),
                (b.heating_start_s, 318.0, 8 * HOUR),
                (b.heating_end_s, 295.0, 10 * HOUR),
                (b.ln2_first_fill_s, 82.0, 9 * HOUR),
                (b.lhe_first_fill_s, None, 1.2 * HOUR),
            ],
            b.lhe_first_fill_s + 2 * DAY,
            lambda ts: _head_cold(scenario, p, ts),
        )
    return np.round(temp, 3)


def _shield_cold(scenario: Scenario, p: Plan, t: np.ndarray) -> np.ndarray:
    # The diode sits on the radiation shield below the nitrogen tank: it is a kelvin or two
    # warmer when the tank is nearly empty (less wetted area).
    level = p.ln2_level.at(t) / 100.0 if p.ln2_level is not None else np.ones(t.shape)
    return 77.6 + 2.5 * (1.0 - level) ** 2 + 0.04 * white(scenario.seed, "shield", t)


def shield_temperature(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """LN2 radiation-shield temperature, K."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    temp = _shield_cold(scenario, p, t)
    if p.bake is not None:
        b = p.bake
        temp = _relax(
            t,
            temp,
            77.8,
            [
                (b.ln2_emptied_s, 295.0, 6 * HOUR),
                (b.heating_start_s, 325.0, 6 * HOUR),
                (b.heating_end_s, 295.0, 8 * HOUR),
                (b.ln2_first_fill_s, None, 2 * HOUR),
            ],
            b.ln2_first_fill_s + 2 * DAY,
            lambda ts: _shield_cold(scenario, p, ts),
        )
    return np.round(temp, 2)


def recovery_flow(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Helium gas flow to the recovery line, L/min: the bath's boil-off as gas (~1.6 L/min),
    tens of L/min of flash gas during a transfer, nothing while the bath is empty."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    seed = scenario.seed
    if p.lhe_level is None:
        return np.zeros(t.shape)
    lv = p.lhe_level
    i = np.clip(np.searchsorted(lv.start, t, side="right") - 1, 0, None)
    boiloff_l_per_day = lv.rate_pct_per_s[i] * DAY / 100.0 * scenario.lhe_capacity_l
    flow = boiloff_l_per_day * HE_GAS_L_PER_LIQUID_L * HE_RECOVERED_FRACTION / 1440.0
    flow = flow * (1.0 + 0.03 * smooth(seed, "flow/weather", t, DAY))
    flow = np.where(lv.at(t) > 0.0, flow, 0.0)
    for tr in p.lhe:
        if tr.kind != "fill":
            continue
        minutes = max((tr.end_s - tr.start_s) / MINUTE, 1.0)
        flash = tr.taken_l * tr.loss_fraction * HE_GAS_L_PER_LIQUID_L * HE_RECOVERED_FRACTION
        flash = flash / minutes
        _add_pulse(flow, t, tr.start_s, tr.end_s, flash, 3 * MINUTE, 15 * MINUTE)
    flow = flow + 0.03 * white(seed, "flow", t)
    return np.round(np.clip(flow, 0.0, None), 2)


def _bake_rise(t: np.ndarray, b: BakeOut, peak: float, slow: float) -> np.ndarray:
    """Extra pressure from the bake: water and hydrogen desorbing from hot walls (a fast
    component up into 1e-5 mbar and a slow one), then, after the heaters are off, a drop of
    three decades within hours and a tail that takes days."""
    out = np.zeros(t.shape)
    dt = (t - b.heating_start_s).astype(np.float64)
    hot = (t >= b.heating_start_s) & (t < b.heating_end_s)
    rise = 1.0 - np.exp(-dt[hot] / (1.5 * HOUR))
    out[hot] = rise * (
        peak * np.exp(-dt[hot] / (11 * HOUR)) + slow * np.exp(-dt[hot] / (50 * HOUR))
    )
    # Gauges and filaments are degassed about every 10 h during the bake (FIELD.md §4).
    cycle = np.mod(dt[hot], 10 * HOUR)
    out[hot] *= np.where((cycle > 5 * HOUR) & (cycle < 5 * HOUR + 20 * MINUTE), 2.5, 1.0)
    length = b.heating_end_s - b.heating_start_s
    at_end = peak * np.exp(-length / (11 * HOUR)) + slow * np.exp(-length / (50 * HOUR))
    cooling = (t >= b.heating_end_s) & (t < b.heating_end_s + 30 * DAY)
    dc = (t[cooling] - b.heating_end_s).astype(np.float64)
    out[cooling] = (
        at_end * np.exp(-dc / (2.5 * HOUR))
        + slow * 0.01 * np.exp(-dc / (20 * HOUR))
        + slow * 0.0027 * np.exp(-dc / (60 * HOUR))
    )
    return out


def _age_days(t: np.ndarray, end_s: int) -> np.ndarray:
    """Days since the chambers were last baked; before this year's bake, as if the previous
    one had been a year earlier."""
    age = (t - end_s) / DAY
    return np.clip(np.where(age < 0, age + 365.0, age), 0.0, 548.0)


def prep_pressure(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Preparation chamber ion gauge (N2-calibrated), mbar."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    seed = scenario.seed
    # 1.1e-10 mbar just after a bake, creeping to ~2.5e-10 a year later.
    base = 1.1e-10 * (1.0 + 1.3 * _age_days(t, _heating_end_s(scenario)) / 365.0)
    base = base * np.exp(0.12 * smooth(seed, "prep/base", t, 12 * HOUR))
    extra = np.zeros(t.shape)
    for e in p.episodes:
        if e.kind == "sputter":
            # Ar is pumped away in a minute; a little lingers in the ion pump for half an hour.
            _add_pulse(extra, t, e.start_s, e.end_s, e.pressure_mbar, 1 * MINUTE, 1.5 * MINUTE)
            _add_pulse(
                extra, t, e.start_s, e.end_s, 2e-3 * e.pressure_mbar, 5 * MINUTE, 25 * MINUTE
            )
        elif e.kind in ("anneal", "deposit"):
            _add_pulse(extra, t, e.start_s, e.end_s, e.pressure_mbar, 2 * MINUTE, 8 * MINUTE)
        elif e.kind in ("transfer", "load_transfer"):
            _add_pulse(extra, t, e.start_s, e.end_s, e.pressure_mbar, 1 * MINUTE, 10 * MINUTE)
    if p.bake is not None:
        extra += _bake_rise(t, p.bake, 2.5e-5, 3e-7)
    pressure = (base + extra) * np.exp(0.03 * white(seed, "prep", t))
    return _round_significant(np.maximum(pressure, 1e-11), 3)


def pressure_burst_s(scenario: Scenario) -> int:
    """When the demo's one pressure burst happens: 75 days after the bake-out, 13:30 local."""
    return _heating_end_s(scenario) + 75 * DAY + int(4.5 * 3600)


def microscope_pressure(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Microscope chamber ion gauge (N2-calibrated), mbar: the cold cryostat pumps, so the
    chamber reads ~3e-11 mbar cold and a few 1e-10 warm."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    seed = scenario.seed
    warm = np.clip((head_temperature(scenario, t) - 4.5) / 290.0, 0.0, 1.0) ** 0.5
    age = _age_days(t, _heating_end_s(scenario))
    base = 2.6e-11 * (1.0 + 0.4 * age / 365.0) * (1.0 - warm) + 3.5e-10 * warm
    base = base * np.exp(0.08 * smooth(seed, "stm/base", t, DAY))
    extra = np.zeros(t.shape)
    for e in p.episodes:
        if e.kind == "transfer":  # the gate valve is open while the sample goes in
            _add_pulse(extra, t, e.start_s, e.end_s, 1.2e-10, 1 * MINUTE, 10 * MINUTE)
    if p.bake is not None:
        extra += 0.2 * _bake_rise(t, p.bake, 2.5e-5, 3e-7)
    # Once in the year a burst: a cold finger's adsorbed gas lets go when a heater is switched
    # on by mistake, a few 1e-9 mbar for ten minutes (invented; the plots must keep it visible).
    burst = pressure_burst_s(scenario)
    _add_pulse(extra, t, burst, burst + 4 * MINUTE, 6e-9, 20, 6 * MINUTE)
    pressure = (base + extra) * np.exp(0.03 * white(seed, "stm", t))
    return _round_significant(np.maximum(pressure, 1e-11), 3)


def load_lock_pressure(scenario: Scenario, t: np.ndarray) -> np.ndarray:
    """Load lock Pirani / cold-cathode combination gauge, mbar: 1e-8–1e-7 pumped, ~1000 vented."""
    t = np.asarray(t, dtype=np.int64)
    p = _plan_for(scenario, t)
    seed = scenario.seed
    base = 1.5e-8 * np.exp(0.25 * smooth(seed, "loadlock/base", t, DAY))
    pressure = base.copy()
    if p.loads:
        vents = np.array([ld.vent_s for ld in p.loads], dtype=np.int64)
        pumps = np.array([ld.pump_s for ld in p.loads], dtype=np.int64)
        i = np.searchsorted(vents, t, side="right") - 1
        has = i >= 0
        j = np.clip(i, 0, None)
        vented = has & (t < pumps[j])
        since = np.where(has & ~vented, (t - pumps[j]).astype(np.float64), np.inf)
        # Roughing takes atmosphere away within a minute; then the water on the walls sets a
        # pump-down ∝ t^-1.5: ~1e-4 mbar after 10 min, ~1e-6 after 3 h, ~5e-8 a day on.
        pumping = 1000.0 * np.exp(-since / 15.0) + 1e-4 * ((since + 60.0) / 600.0) ** -1.5
        pressure = np.where(vented, 1000.0, base + np.where(np.isfinite(since), pumping, 0.0))
    pressure = pressure * np.exp(0.03 * white(seed, "loadlock", t))
    return _round_significant(np.clip(pressure, 1e-9, 1000.0), 2)


SERIES: dict[str, Callable[[Scenario, np.ndarray], np.ndarray]] = {
    "prep_pressure": prep_pressure,
    "microscope_pressure": microscope_pressure,
    "load_lock_pressure": load_lock_pressure,
    "head_temperature": head_temperature,
    "shield_temperature": shield_temperature,
    "lhe_level": lhe_level,
    "ln2_level": ln2_level,
    "recovery_flow": recovery_flow,
}


def series(scenario: Scenario, name: str, t: np.ndarray) -> np.ndarray:
    """The values of one named series at instants ``t`` (UTC seconds): an array of t's shape."""
    try:
        generate = SERIES[name]
    except KeyError:
        raise ValueError(f"unknown demo series {name!r}; known: {', '.join(SERIES)}") from None
    return generate(scenario, np.asarray(t, dtype=np.int64))
