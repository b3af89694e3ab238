"""The demo lab's crystals, recipes and evaporators, and a year of preparations on LTM-1.

Two invented single crystals (Cu(111) #2 and Ag(100) #1) take turns on the microscope in
four-week campaigns. Each preparation day of the readings story (:func:`readings.plan`: the
sputter/anneal episodes that raise the prep chamber's pressure, the occasional deposition, the
move to the microscope) becomes records here, at the same instants:

* a cleaning preparation at the first sputter, with one sputter + anneal pair per cycle of the
  plan, the durations and gauge pressures the plan's episodes had (as an operator would note
  them: whole minutes, two digits). Most follow the crystal's cleaning recipe with the values
  actually used; a one-cycle day that happens to match the recipe is logged as the recipe
  unchanged; some repeat the crystal's last cleaning with small changes (from its stored steps,
  as the "repeat" button does); a few are ad hoc (a thermocouple read in mV, a LEED check);
* on a deposition day, a NaCl or C60 preparation from a calibrated K-cell at the deposition
  episode, so its coverage comes from the cell's calibration valid on that day;
* the transfers: the other crystal to the storage if it was on the stage, this one into the
  preparation chamber, and to the microscope stage at the plan's transfer;
* on some days, a CO dose onto the cold sample on the stage, for tip functionalisation.

The cleaning recipe of Cu(111) is revised after the bake-out (a longer, stronger sputter), and
the cells are recalibrated then, so versions and calibration periods both show. Everything goes
through :mod:`labbook.samples.actions` acting as the person who did the work (the lab manager
sets up the cells); every record is found again by its natural key (sample name, recipe name and
version, source name, calibration time, preparation sample + start, transfer sample + time +
place), so a second run adds nothing. Invented data only (DESIGN.md §5).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
from django.db import transaction

from labbook.demo import DemoContext
from labbook.demo.readings import Episode, Scenario, plan
from labbook.samples import actions, queries
from labbook.samples.models import (
    DepositionSource,
    Location,
    Preparation,
    RateCalibration,
    Recipe,
    Sample,
    Transfer,
)
from labbook.science.thermometry import emf_from_temperature

# Seed topics of their own, so that these choices never shift the readings' (which use 1-3).
_TOPIC_DAY = 21
CAMPAIGN_WEEKS = 4
# The crystals arrived (and the cells were first calibrated) this long before the bake-out:
# with a year of demo data, a few days before the first reading.
STORY_LEAD_DAYS = 160
# A recipe is "followed unchanged" when the plan's step lasted within this of the recipe's.
UNCHANGED_WITHIN_S = 4 * 60


@dataclass(frozen=True)
class Crystal:
    name: str
    substrate: str
    identifier: str
    notes: str
    clean_recipe: str
    owner: str  # the PhD student whose project it is
    deposits: tuple[tuple[str, float], ...]  # (recipe, probability) on a deposition day


CU = Crystal(
    name="Cu(111) #2",
    substrate="Cu(111)",
    identifier="holder C2",
    notes="Invented demo crystal: 8 mm disc, polished to < 0.1° miscut, on a Mo holder.",
    clean_recipe="Cu(111) clean",
    owner="jonas",
    deposits=(("C60 submonolayer", 0.5), ("NaCl islands", 0.5)),
)
AG = Crystal(
    name="Ag(100) #1",
    substrate="Ag(100)",
    identifier="holder A1",
    notes="Invented demo crystal: hat-shaped, 7 mm, on a Mo holder with a type K thermocouple.",
    clean_recipe="Ag(100) clean",
    owner="leo",
    deposits=(("NaCl islands", 0.8), ("C60 submonolayer", 0.2)),
)
CRYSTALS: tuple[Crystal, ...] = (CU, AG)

NACL_CELL = "NaCl K-cell"
C60_CELL = "C60 K-cell"
SOURCES = (
    (NACL_CELL, "NaCl", "Knudsen cell with a BN crucible of NaCl, port 3 (invented for the demo)."),
    (
        C60_CELL,
        "C60",
        "Knudsen cell with a quartz crucible of C60, port 5 (invented for the demo).",
    ),
)
# Invented STM area fractions (closed layers) after timed depositions on clean Cu(111):
# (days after the story starts, [(duration_s, coverage_ml), …]). The second set is after the
# bake-out, when the cells were outgassed and the NaCl crucible refilled.
CALIBRATIONS: dict[str, tuple[tuple[str, list[tuple[float, float]]], ...]] = {
    NACL_CELL: (
        ("first", [(300, 0.29), (600, 0.62), (900, 0.88), (1200, 1.21)]),
        ("after_bake", [(300, 0.36), (600, 0.69), (900, 1.07)]),
    ),
    C60_CELL: (
        ("first", [(300, 0.21), (600, 0.39), (900, 0.62)]),
        ("after_bake", [(300, 0.17), (600, 0.36), (900, 0.52), (1200, 0.71)]),
    ),
}


def _sputter(energy: str, current: str, minutes: int, pressure: str = "5e-6 mbar") -> dict:
    return {
        "kind": "sputter",
        "gas": "Ar",
        "energy_ev": energy,
        "current_a": current,
        "beam_area_cm2": "1 cm^2",
        "pressure_mbar": pressure,
        "duration_s": f"{minutes} min",
    }


def _anneal(kelvin: float, minutes: int) -> dict:
    return {
        "kind": "anneal",
        "temperature_k": f"{kelvin:.0f} K",
        "duration_s": f"{minutes} min",
        "method": "resistive",
        "cleans": True,
    }


CU_CLEAN_V1 = [_sputter("1 keV", "3 uA", 20), _anneal(770, 15)]
# After the bake-out carbon showed at the step edges: sputter longer and harder, anneal hotter.
CU_CLEAN_V2 = [_sputter("1 keV", "4 uA", 25), _anneal(790, 15)]
AG_CLEAN = [_sputter("0.8 keV", "2.5 uA", 20, "4e-6 mbar"), _anneal(720, 15)]


def _deposit(material: str, source_id: int, minutes: int, cell_kelvin: int) -> dict:
    return {
        "kind": "deposit",
        "material": material,
        "source": source_id,
        "duration_s": f"{minutes} min",
        "source_temperature_k": f"{cell_kelvin} K",
        "sample_temperature_k": "295 K",
        # Islands of a bilayer / a closed layer of molecules count as 1 ML (FIELD.md §1.3).
        "coverage_definition": "closed_layer",
    }


CO_DOSE = [
    {
        "kind": "dose",
        "gas": "CO",
        "pressure_mbar": "1e-8 mbar",
        "duration_s": "20 s",
        "sample_temperature_k": "5 K",
        "notes": "leak valve into the microscope chamber, cryostat shutters open",
    }
]


@dataclass
class _Records:
    samples: dict[str, Sample]
    recipes: dict[tuple[str, int], Recipe]
    sources: dict[str, DepositionSource]


# --- setup: crystals, cells, calibrations, recipes ------------------------------------------


def _story_start(scenario: Scenario) -> datetime:
    return datetime.fromtimestamp(scenario.bake_start_s, UTC) - timedelta(days=STORY_LEAD_DAYS)


def _bake(scenario: Scenario) -> datetime:
    return datetime.fromtimestamp(scenario.bake_start_s, UTC)


def _calibration_time(scenario: Scenario, which: str) -> datetime:
    if which == "first":
        return _story_start(scenario) - timedelta(days=3)
    # Tuesday of the week after the bake-out, 15:00 local: the first working day back.
    return _bake(scenario) + timedelta(days=8, hours=7)


def _revision_time(scenario: Scenario) -> datetime:
    """From this day on the Cu(111) cleanings follow version 2."""
    return _bake(scenario) + timedelta(days=9)


def _ensure_setup(ctx: DemoContext, scenario: Scenario) -> tuple[_Records, dict[str, int]]:
    users, manager, ltm = ctx.users, ctx.manager, ctx.instrument
    new = {"samples": 0, "recipes": 0, "sources": 0, "calibrations": 0}
    samples: dict[str, Sample] = {}
    for crystal in CRYSTALS:
        sample = Sample.objects.filter(name=crystal.name).first()
        if sample is None:
            sample = actions.create_sample(
                name=crystal.name,
                substrate=crystal.substrate,
                identifier=crystal.identifier,
                notes=crystal.notes,
                actor=users[crystal.owner],
            )
            new["samples"] += 1
        samples[crystal.name] = sample

    sources: dict[str, DepositionSource] = {}
    for name, material, notes in SOURCES:
        source = DepositionSource.objects.filter(instrument=ltm, name=name).first()
        if source is None:
            # Evaporators are lab set-up: the manager adds them.
            source = actions.add_deposition_source(
                ltm, name=name, material=material, notes=notes, actor=manager
            )
            new["sources"] += 1
        sources[name] = source
        for which, points in CALIBRATIONS[name]:
            measured_at = _calibration_time(scenario, which)
            if RateCalibration.objects.filter(source=source, measured_at=measured_at).exists():
                continue
            actions.record_calibration(
                source,
                points=[{"duration_s": t, "coverage_ml": c} for t, c in points],
                measured_at=measured_at,
                coverage_definition="closed_layer",
                notes="STM area fraction over five 100 nm images on clean Cu(111)",
                actor=users["amira"],
            )
            new["calibrations"] += 1

    nacl, c60 = sources[NACL_CELL].pk, sources[C60_CELL].pk
    wanted: list[tuple[str, int, str, str, str, list[dict]]] = [
        (
            "Cu(111) clean",
            1,
            "jonas",
            "Cu(111)",
            "One sputter/anneal cycle; repeat the cycle 2-3 times after a deposition.",
            CU_CLEAN_V1,
        ),
        (
            "Cu(111) clean",
            2,
            "amira",
            "Cu(111)",
            "v2 after the bake-out: carbon at the step edges, so a longer, stronger sputter "
            "and a hotter anneal.",
            CU_CLEAN_V2,
        ),
        ("Ag(100) clean", 1, "leo", "Ag(100)", "One gentle sputter/anneal cycle.", AG_CLEAN),
        (
            "NaCl islands",
            1,
            "leo",
            "",
            "NaCl from the K-cell onto the sample at room temperature: bilayer islands.",
            [_deposit("NaCl", nacl, 10, 780)],
        ),
        (
            "C60 submonolayer",
            1,
            "jonas",
            "",
            "C60 from the K-cell onto the sample at room temperature, about a third of a layer.",
            [_deposit("C60", c60, 8, 690)],
        ),
        (
            "CO for tip functionalisation",
            1,
            "amira",
            "",
            "A few hundredths of a monolayer of CO onto the cold sample, to pick up with the tip.",
            CO_DOSE,
        ),
    ]
    recipes: dict[tuple[str, int], Recipe] = {}
    for name, version, author, substrate, description, steps in wanted:
        recipe = Recipe.objects.filter(name=name, version=version).first()
        if recipe is None:
            if version == 1:
                recipe = actions.create_recipe(
                    name=name,
                    steps=steps,
                    description=description,
                    substrate=substrate,
                    actor=users[author],
                )
            else:
                recipe = actions.revise_recipe(
                    recipes[(name, version - 1)],
                    steps=steps,
                    description=description,
                    actor=users[author],
                )
            new["recipes"] += 1
        recipes[(name, version)] = recipe
    return _Records(samples, recipes, sources), new


# --- the year of preparations --------------------------------------------------------------


@dataclass
class _Day:
    """One preparation day of the plan: its cleaning cycles, deposition and transfer."""

    ordinal: int
    cycles: list[tuple[Episode, Episode]]
    deposit: Episode | None
    transfer: Episode | None


def _days(episodes: Sequence[Episode], zone: ZoneInfo, since_s: int) -> list[_Day]:
    by_day: dict[int, list[Episode]] = {}
    for episode in episodes:
        if episode.start_s < since_s or episode.kind not in (
            "sputter",
            "anneal",
            "deposit",
            "transfer",
        ):
            continue
        day = datetime.fromtimestamp(episode.start_s, UTC).astimezone(zone).date().toordinal()
        by_day.setdefault(day, []).append(episode)
    days = []
    for ordinal, items in sorted(by_day.items()):
        sputters = [e for e in items if e.kind == "sputter"]
        anneals = [e for e in items if e.kind == "anneal"]
        if not sputters or len(sputters) != len(anneals):
            continue  # a day cut by the window's start: its story began the day before
        days.append(
            _Day(
                ordinal,
                list(zip(sputters, anneals, strict=True)),
                next((e for e in items if e.kind == "deposit"), None),
                next((e for e in items if e.kind == "transfer"), None),
            )
        )
    return days


def _at(seconds: int) -> datetime:
    return datetime.fromtimestamp(seconds, UTC)


def _minutes(episode: Episode) -> int:
    return max(1, round((episode.end_s - episode.start_s) / 60))


def _crystal_for(scenario: Scenario, ordinal: int) -> Crystal:
    """Four-week campaigns counted from the story's start: Cu(111), Ag(100), Cu(111), Ag(100),
    Cu(111), then again — Jonas's project has the microscope a little more often."""
    start = _story_start(scenario).date().toordinal()
    campaign = max(ordinal - start, 0) // (7 * CAMPAIGN_WEEKS)
    return AG if campaign % 5 in (1, 3) else CU


def _operator(crystal: Crystal, u: float) -> str:
    if u < 0.7:
        return crystal.owner
    return "amira" if u < 0.9 else "greta"


def _recipe_duration_s(step: dict) -> float:
    number, unit = step["duration_s"].split()
    return float(number) * {"min": 60, "s": 1}[unit]


def _as_done(
    template: Sequence[dict], cycles: list[tuple[Episode, Episode]], u: np.ndarray
) -> list[dict]:
    """The template's sputter/anneal pair once per cycle of the plan, with what the day's
    episodes took: durations, the gauge reading, a current and temperature a little off."""
    sputter_t = next(s for s in template if s["kind"] == "sputter")
    anneal_t = next(s for s in template if s["kind"] == "anneal")
    steps = []
    for k, (sputter, anneal) in enumerate(cycles):
        current = _number(sputter_t["current_a"]) * (0.9 + 0.2 * u[k])
        steps.append(
            sputter_t
            | {
                "current_a": f"{current:.1f} uA",
                "pressure_mbar": f"{sputter.pressure_mbar:.1e} mbar",
                "duration_s": f"{_minutes(sputter)} min",
            }
        )
        if "thermocouple_mv" in anneal_t:  # a template logged as the thermocouple's reading
            mv = _number(anneal_t["thermocouple_mv"]) + 0.4 * (u[k + 3] - 0.5)
            heat = {"thermocouple_mv": f"{mv:.2f} mV"}
        else:
            kelvin = _number(anneal_t["temperature_k"]) + 20.0 * (u[k + 3] - 0.5)
            heat = {"temperature_k": f"{kelvin:.0f} K"}
        steps.append(anneal_t | heat | {"duration_s": f"{_minutes(anneal)} min"})
    return steps


def _number(value: Any) -> float:
    """The number of a template value: 3.0 from "3 uA" (templates keep the unit as typed)."""
    return float(str(value).split()[0])


def _last_cleaning(sample: Sample, before: datetime) -> Preparation | None:
    return (
        Preparation.objects.filter(
            sample=sample, started_at__lt=before, steps__kind="sputter", retired_at__isnull=True
        )
        .order_by("-started_at")
        .prefetch_related("steps")
        .first()
    )


def _cleaning(
    day: _Day, crystal: Crystal, recipe: Recipe, sample: Sample, u: np.ndarray, zone: ZoneInfo
) -> tuple[list[dict] | None, Recipe | None, str]:
    """(steps or None for "the recipe unchanged", the recipe followed, notes) of the day's
    cleaning."""
    sputter, anneal = day.cycles[0]
    template = recipe.steps
    matches = len(day.cycles) == 1 and all(
        abs((e.end_s - e.start_s) - _recipe_duration_s(step)) <= UNCHANGED_WITHIN_S
        for e, step in zip((sputter, anneal), template, strict=True)
    )
    if matches and u[0] < 0.8:
        return None, recipe, ""
    if u[1] < 0.2:
        last = _last_cleaning(sample, _at(sputter.start_s))
        if last is not None:
            # "Repeat the last preparation": its steps as stored, the day's times and gauge
            # readings over them.
            steps = [queries.step_as_template(s) for s in last.steps.all()]
            pair = [
                next(s for s in steps if s["kind"] == "sputter"),
                next(s for s in reversed(steps) if s["kind"] == "anneal"),
            ]
            local = last.started_at.astimezone(zone)
            return (
                _as_done(pair, day.cycles, u[4:]),
                None,
                f"as on {local:%d %b}, {len(day.cycles)} "
                + ("cycle" if len(day.cycles) == 1 else "cycles"),
            )
    if u[1] < 0.3:
        return (
            _ad_hoc(template, day, crystal, u),
            None,
            "ad hoc: anneal read off the thermocouple, LEED checked",
        )
    return _as_done(template, day.cycles, u[4:]), recipe, ""


def _ad_hoc(template: Sequence[dict], day: _Day, crystal: Crystal, u: np.ndarray) -> list[dict]:
    """Someone's own way: the energy typed as the gun's voltage, the anneal read off the type K
    thermocouple in mV (the raw reading is kept, the temperature derived), a LEED check."""
    steps = _as_done(template, day.cycles, u[4:])
    for step in steps:
        if step["kind"] == "sputter":
            step["energy_ev"] = f"{_number(step['energy_ev']):g} kV"
        elif "temperature_k" in step:
            kelvin = _number(step.pop("temperature_k"))
            step["thermocouple_mv"] = f"{emf_from_temperature(kelvin, 'K'):.2f} mV"
            step["thermocouple_type"] = "K"
    steps.append(
        {
            "kind": "other",
            "description": "LEED at 140 eV: sharp (1×1) spots, low background",
            "notes": f"{crystal.substrate} looks fine",
        }
    )
    return steps


class _Writer:
    """Records through the actions, skipping what a previous run already made (natural keys
    looked up once, not per record)."""

    def __init__(self, ctx: DemoContext, samples: Sequence[Sample]) -> None:
        self.ctx = ctx
        self.preparations = set(
            Preparation.objects.filter(sample__in=samples).values_list("sample_id", "started_at")
        )
        self.transfers = set(
            Transfer.objects.filter(sample__in=samples).values_list("sample_id", "at", "location")
        )
        self.new_preparations = 0
        self.new_transfers = 0

    def preparation(self, sample: Sample, started_at: datetime, ended_at: datetime, **kw) -> None:
        if ended_at > self.ctx.now or (sample.pk, started_at) in self.preparations:
            return  # not over yet at "now" (a later run logs it), or logged already
        actions.record_preparation(
            sample=sample,
            instrument=self.ctx.instrument,
            started_at=started_at,
            ended_at=ended_at,
            **kw,
        )
        self.preparations.add((sample.pk, started_at))
        self.new_preparations += 1

    def transfer(self, sample: Sample, at: datetime, location: str, actor, notes: str = "") -> None:
        if at > self.ctx.now or (sample.pk, at, location) in self.transfers:
            return
        actions.transfer_sample(
            sample,
            location=location,
            at=at,
            instrument=self.ctx.instrument,
            notes=notes,
            actor=actor,
        )
        self.transfers.add((sample.pk, at, location))
        self.new_transfers += 1


def _on_stage(sample: Sample, at: datetime) -> bool:
    where = queries.location_at(sample, at)
    return where is not None and where.location == Location.MICROSCOPE_STAGE


def _log_day(
    day: _Day, scenario: Scenario, records: _Records, writer: _Writer, users: dict[str, Any]
) -> None:
    u = np.random.default_rng([scenario.seed, _TOPIC_DAY, day.ordinal]).random(24)
    crystal = _crystal_for(scenario, day.ordinal)
    sample = records.samples[crystal.name]
    operator = users[_operator(crystal, u[10])]
    first_sputter, last_anneal = day.cycles[0][0], day.cycles[-1][1]
    t0 = _at(first_sputter.start_s)

    # The other crystal leaves the stage for the storage; this one goes to the prep chamber.
    for other in records.samples.values():
        if other != sample and _on_stage(other, t0 - timedelta(minutes=30)):
            writer.transfer(other, t0 - timedelta(minutes=25), Location.STORAGE, operator)
    writer.transfer(sample, t0 - timedelta(minutes=15), Location.PREPARATION_CHAMBER, operator)

    version = 2 if crystal is CU and t0 >= _revision_time(scenario) else 1
    recipe = records.recipes[(crystal.clean_recipe, version)]
    steps, followed, notes = _cleaning(
        day, crystal, recipe, sample, u, ZoneInfo(scenario.time_zone)
    )
    writer.preparation(
        sample,
        t0,
        _at(last_anneal.end_s),
        steps=steps,
        recipe=followed,
        operator=operator,
        notes=notes,
        actor=operator,
    )

    if day.deposit is not None:
        name = crystal.deposits[0][0] if u[11] < crystal.deposits[0][1] else crystal.deposits[1][0]
        recipe = records.recipes[(name, 1)]
        minutes = _minutes(day.deposit)
        planned = _recipe_duration_s(recipe.steps[0]) / 60
        steps = (
            None
            if abs(minutes - planned) <= 1
            else [recipe.steps[0] | {"duration_s": f"{minutes} min"}]
        )
        writer.preparation(
            sample,
            _at(day.deposit.start_s),
            _at(day.deposit.end_s),
            steps=steps,
            recipe=recipe,
            operator=operator,
            actor=operator,
        )

    if day.transfer is not None:
        writer.transfer(sample, _at(day.transfer.start_s), Location.MICROSCOPE_STAGE, operator)
        if u[12] < 0.3:
            # CO onto the cold sample once it sits on the stage, for the tip (FIELD.md §1.2).
            at = _at(day.transfer.end_s) + timedelta(minutes=int(40 + 50 * u[13]))
            dose = records.recipes[("CO for tip functionalisation", 1)]
            who = users["amira"] if u[14] < 0.6 else operator
            writer.preparation(
                sample,
                at,
                at + timedelta(seconds=20),
                recipe=dose,
                operator=who,
                actor=who,
            )


def load_samples(ctx: DemoContext) -> dict[str, int]:
    """The crystals, cells, calibrations and recipes, then every preparation day of the
    readings story inside the demo window (from when the crystals arrived)."""
    # load imports this module for its STEPS list, so its helper is imported here.
    from labbook.demo.load import scenario_for

    scenario = ctx.scenario or scenario_for(ctx.instrument, ctx.now)
    zone = ZoneInfo(scenario.time_zone)
    # One transaction for the whole year: SQLite then syncs once, not once per record. Each
    # action still runs its own checks and history inside it.
    with transaction.atomic():
        records, new = _ensure_setup(ctx, scenario)
        samples = list(records.samples.values())
        writer = _Writer(ctx, samples)
        arrived = _story_start(scenario)
        for sample in samples:
            writer.transfer(
                sample,
                arrived,
                Location.STORAGE,
                ctx.manager,
                notes="in the in-vacuum storage of LTM-1 when the demo story begins",
            )
        since = max(ctx.start, arrived)
        story = plan(scenario, int(since.timestamp()), int(ctx.now.timestamp()))
        for day in _days(story.episodes, zone, int(since.timestamp())):
            _log_day(day, scenario, records, writer, ctx.users)

    counts = {
        "samples": len(samples),
        "recipes": Recipe.objects.filter(name__in={k[0] for k in records.recipes}).count(),
        "deposition_sources": len(records.sources),
        "calibrations": RateCalibration.objects.filter(source__in=records.sources.values()).count(),
        "preparations": Preparation.objects.filter(sample__in=samples).count(),
        "transfers": Transfer.objects.filter(sample__in=samples).count(),
    }
    ctx.report(
        f"samples: {counts['samples']} crystals, {counts['recipes']} recipe versions, "
        f"{counts['deposition_sources']} cells with {counts['calibrations']} calibrations, "
        f"{counts['preparations']} preparations ({writer.new_preparations} new), "
        f"{counts['transfers']} transfers ({writer.new_transfers} new); "
        f"{sum(new.values())} set-up records new"
    )
    return counts
