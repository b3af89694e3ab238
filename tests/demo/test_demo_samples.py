"""The demo's crystals, recipes, cells and preparations: made through the actions, telling the
same story as the logged readings, and made once however often ``demo`` runs."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest

from labbook.demo import readings as gen
from labbook.demo import samples as demo_samples
from labbook.demo.load import load_demo, scenario_for
from labbook.instruments.models import Instrument, Reading
from labbook.samples import queries
from labbook.samples.models import (
    DepositionSource,
    Location,
    Preparation,
    PreparationStep,
    RateCalibration,
    Recipe,
    Sample,
    Transfer,
)

NOW = datetime(2025, 3, 12, 14, 37, 21, tzinfo=UTC)  # as in test_demo.py
BERLIN = ZoneInfo("Europe/Berlin")
DAYS = 45  # both crystals, a swap on the stage, a NaCl deposition and the cleaning after it
ELEMENTARY_CHARGE_C = 1.602176634e-19  # exact since the 2019 SI
pytestmark = pytest.mark.django_db


@pytest.fixture(autouse=True)
def _fast_passwords(settings):
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]


@pytest.fixture
def demo():
    return load_demo(days=DAYS, now=NOW)


def _story() -> gen.Plan:
    scenario = scenario_for(Instrument.objects.get(name="LTM-1"), NOW)
    start = NOW - timedelta(days=DAYS + 1)
    return gen.plan(scenario, int(start.timestamp()), int(NOW.timestamp()))


def test_crystals_recipes_and_calibrated_cells(demo):
    crystals = {s.name: s for s in Sample.objects.all()}
    assert set(crystals) == {"Cu(111) #2", "Ag(100) #1"}
    assert crystals["Cu(111) #2"].substrate == "Cu(111)"
    # REFERENCES.md §6: one Cu(111) layer is 1.767e15 atoms/cm², read from the substrate.
    assert crystals["Cu(111) #2"].monolayer_density_per_cm2 == pytest.approx(1.767e15, rel=5e-4)
    assert crystals["Ag(100) #1"].facet == "100"

    v1, v2 = Recipe.objects.filter(name="Cu(111) clean").order_by("version")
    assert (v1.version, v2.version, v2.previous) == (1, 2, v1)
    assert v2.steps != v1.steps and list(queries.current_recipes()).count(v2) == 1
    assert v1 not in queries.current_recipes()
    assert (v1.created_by.username, v2.created_by.username) == ("jonas", "amira")
    assert v2.history.get().history_user.username == "amira"
    assert set(Recipe.objects.values_list("name", flat=True)) == {
        "Cu(111) clean",
        "Ag(100) clean",
        "NaCl islands",
        "C60 submonolayer",
        "CO for tip functionalisation",
    }

    cells = {s.name: s for s in DepositionSource.objects.filter(instrument__name="LTM-1")}
    assert {n: c.material for n, c in cells.items()} == {"NaCl K-cell": "NaCl", "C60 K-cell": "C60"}
    assert {h.history_user.username for h in DepositionSource.history.all()} == {"greta"}
    nacl_first = RateCalibration.objects.filter(source=cells["NaCl K-cell"]).earliest()
    # Least squares through the origin of the invented points (5, 10, 15, 20 min →
    # 0.29, 0.62, 0.88, 1.21 ML): k = Σxy/Σx² = 45.05/750 ML/min.
    assert nacl_first.rate_ml_per_min == pytest.approx(45.05 / 750)
    assert 0 < nacl_first.uncertainty_ml_per_min < 0.01 and len(nacl_first.points) == 4
    assert RateCalibration.objects.count() == demo["calibrations"] == 4
    assert demo["recipes"] == 6 and demo["samples"] == 2 and demo["deposition_sources"] == 2


def test_preparations_carry_their_derived_values(demo):
    assert demo["preparations"] == Preparation.objects.count() > 10
    sputters = PreparationStep.objects.filter(kind="sputter")
    assert sputters.exists()
    for step in sputters:
        # Φ = I·t/(e·A) (REFERENCES.md §4), from the values stored beside it.
        expected = step.current_a * step.duration_s / (ELEMENTARY_CHARGE_C * step.beam_area_cm2)
        assert step.fluence_per_cm2 == pytest.approx(expected)
        assert 1e16 < step.fluence_per_cm2 < 1e17  # µA for tens of minutes on ~1 cm²
    deposits = PreparationStep.objects.filter(kind="deposit").select_related("calibration")
    assert {d.material for d in deposits} == {"NaCl", "C60"}
    for step in deposits:
        assert step.rate_origin == "calibration" and step.calibration.source == step.source
        assert step.calibration.measured_at <= step.preparation.started_at
        assert step.coverage_ml == pytest.approx(
            step.calibration.rate_ml_per_min * step.duration_s / 60
        )
        assert 0.1 < step.coverage_ml < 1.5
    doses = PreparationStep.objects.filter(kind="dose")
    assert doses.exists()
    for step in doses:
        # REFERENCES.md §2: 1e-6 mbar for 100 s is 75.0 L, so 1e-8 mbar for 20 s is 0.150 L.
        assert (step.gas, step.duration_s) == ("CO", 20.0)
        assert step.exposure_langmuir == pytest.approx(0.1500123, rel=1e-6)
        assert step.sample_temperature_k == 5.0
    # Each kind of record the brief asks for: recipe followed unchanged, repeated, ad hoc.
    unchanged = [
        p
        for p in Preparation.objects.exclude(recipe=None)
        if [s.raw_input.get("duration_s") for s in p.steps.order_by("position")]
        == [s.get("duration_s") for s in p.recipe.steps]
    ]
    assert unchanged
    assert Preparation.objects.filter(recipe=None, notes__startswith="as on").exists()


def test_cleanings_happen_when_the_prep_chamber_gauge_shows_them(demo):
    story = _story()
    sputter_starts = {e.start_s: e for e in story.episodes if e.kind == "sputter"}
    gauge = Reading.objects.filter(channel__name="prep chamber ion gauge")
    cleanings = Preparation.objects.filter(steps__kind="sputter").distinct()
    assert cleanings.count() > 5
    for prep in cleanings:
        local = prep.started_at.astimezone(BERLIN)
        assert local.weekday() < 5 and 8 <= local.hour < 18, local
        episode = sputter_starts[int(prep.started_at.timestamp())]
        first = prep.steps.filter(kind="sputter").order_by("position").first()
        # Logged in whole minutes, as long as the episode (a recipe followed unchanged: within
        # the tolerance that made it count as unchanged).
        assert abs(first.duration_s - (episode.end_s - episode.start_s)) <= 4 * 60
        assert prep.ended_at > prep.started_at
        # The argon is visible on the logged gauge during the sputter: 1e-6 mbar, not 1e-10.
        during = gauge.filter(
            t__gt=prep.started_at + timedelta(minutes=3), t__lt=_at(episode.end_s)
        )
        assert during.exists() and min(r.value for r in during) > 1e-6


def _at(seconds: int) -> datetime:
    return datetime.fromtimestamp(seconds, UTC)


def test_crystals_go_to_the_stage_after_their_preparation(demo):
    story = _story()
    moves = {e.start_s for e in story.episodes if e.kind == "transfer"}
    staged = Transfer.objects.filter(location=Location.MICROSCOPE_STAGE)
    assert staged.exists()
    for transfer in staged.select_related("sample", "moved_by"):
        assert int(transfer.at.timestamp()) in moves
        # That day's preparation of this crystal was over when it moved.
        assert Preparation.objects.filter(
            sample=transfer.sample,
            started_at__gt=transfer.at - timedelta(hours=8),
            ended_at__lte=transfer.at,
        ).exists()
        # It came from the preparation chamber, where it was just prepared.
        before = queries.location_at(transfer.sample, transfer.at - timedelta(seconds=1))
        assert before.location == Location.PREPARATION_CHAMBER
        assert transfer.moved_by.username in {"amira", "jonas", "leo", "greta"}
    # Only one crystal sits on the stage at a time: a swap sends the other to the storage.
    for transfer in staged:
        on_stage = [
            s
            for s in Sample.objects.all()
            if queries.location_at(s, transfer.at).location == Location.MICROSCOPE_STAGE
        ]
        assert on_stage == [transfer.sample]
    assert Transfer.objects.filter(location=Location.STORAGE).count() > 2


def test_history_names_the_operator(demo):
    for prep in Preparation.objects.select_related("operator"):
        assert prep.history.get().history_user == prep.operator
        assert prep.operator.groups.filter(name="members").exists()
    operators = set(Preparation.objects.values_list("operator__username", flat=True))
    assert {"jonas", "leo", "amira"} <= operators


def test_nacl_then_the_next_cleaning_leaves_the_surface_clean(demo):
    deposit = (
        PreparationStep.objects.filter(kind="deposit", material="NaCl")
        .select_related("preparation__sample")
        .order_by("preparation__started_at")
        .first()
    )
    prep = deposit.preparation
    after = queries.surface_state(prep.sample, prep.ended_at)
    assert (
        after.coverage_of("NaCl") == pytest.approx(deposit.coverage_ml) and deposit.coverage_ml > 0
    )
    assert not after.is_clean
    cleaning = (
        Preparation.objects.filter(
            sample=prep.sample, started_at__gt=prep.started_at, steps__cleans=True
        )
        .order_by("started_at")
        .first()
    )
    assert cleaning is not None
    state = queries.surface_state(prep.sample, cleaning.ended_at)
    assert state.is_clean and state.coverage_of("NaCl") == 0.0
    assert state.cleaned_at == cleaning.started_at


def test_a_second_run_creates_nothing():
    first = load_demo(days=DAYS, now=NOW)
    models = (Sample, Recipe, DepositionSource, RateCalibration, Preparation, PreparationStep)
    before = {m.__name__: (m.objects.count(), m.history.count()) for m in (*models, Transfer)}
    second = load_demo(days=DAYS, now=NOW)
    assert second == first
    assert {m.__name__: (m.objects.count(), m.history.count()) for m in (*models, Transfer)} == (
        before
    )


def test_a_later_run_adds_only_the_new_days():
    load_demo(days=DAYS, now=NOW)
    Instrument.objects.filter(name="LTM-1").update(created_at=NOW)
    kept = set(Preparation.objects.values_list("sample__name", "started_at"))
    later = NOW + timedelta(days=7)
    load_demo(days=DAYS, now=later)
    now_there = set(Preparation.objects.values_list("sample__name", "started_at"))
    assert kept < now_there
    assert all(NOW - timedelta(hours=12) < t <= later for _, t in now_there - kept)


def test_the_recipe_revision_and_the_recalibration_show_across_the_bake_out():
    load_demo(days=240, now=NOW)
    scenario = scenario_for(Instrument.objects.get(name="LTM-1"), NOW)
    revised = demo_samples._revision_time(scenario)
    cu = Preparation.objects.filter(recipe__name="Cu(111) clean")
    assert cu.filter(recipe__version=1).exists() and cu.filter(recipe__version=2).exists()
    assert all(p.started_at < revised for p in cu.filter(recipe__version=1))
    assert all(p.started_at >= revised for p in cu.filter(recipe__version=2))
    # No preparation while the system is baked (the readings' story has no work then).
    bake = datetime.fromtimestamp(scenario.bake_start_s, UTC)
    assert not Preparation.objects.filter(
        started_at__gte=bake - timedelta(days=1), started_at__lt=bake + timedelta(days=8)
    ).exists()
    # Depositions use the cell's calibration valid on their day: the first one before the
    # bake-out, the new one after.
    for step in PreparationStep.objects.filter(kind="deposit").select_related("calibration"):
        newest = (
            RateCalibration.objects.filter(
                source=step.source, measured_at__lte=step.preparation.started_at
            )
            .order_by("-measured_at")
            .first()
        )
        assert step.calibration == newest
    used = set(
        PreparationStep.objects.exclude(calibration=None).values_list("calibration", flat=True)
    )
    assert len(used) >= 3
