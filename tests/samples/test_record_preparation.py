"""Logging a preparation: the values used, the doses derived from them, all or nothing."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from labbook.samples import actions, queries
from labbook.samples.models import Preparation, PreparationStep
from labbook.samples.steps import StepErrors

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)

CLEAN_CU = [
    {
        "kind": "sputter",
        "gas": "Ar",
        "energy_ev": "1 keV",
        "current_a": "1 uA",
        "beam_area_cm2": 1,
        "duration_s": "10 min",
        "pressure_mbar": "5e-6 mbar",
    },
    {
        "kind": "anneal",
        "temperature_k": "800 K",
        "duration_s": "15 min",
        "method": "resistive",
        "cleans": True,
    },
]


@pytest.fixture
def crystal(member):
    return actions.create_sample(name="Cu(111) #3", substrate="Cu(111)", actor=member)


def test_sample_knows_its_monolayer_from_the_substrate(crystal):
    # REFERENCES.md §6: fcc(111) n = 4/(√3 a²), Cu a = 3.6149 Å → 1.767e15 cm⁻².
    assert (crystal.material, crystal.facet) == ("Cu", "111")
    assert crystal.monolayer_density_per_cm2 == pytest.approx(1.767e15, rel=5e-4)


def test_preparation_stores_the_derived_doses(member, instrument, crystal):
    steps = CLEAN_CU + [
        {"kind": "dose", "gas": "CO", "pressure_mbar": "1e-8 mbar", "duration_s": "100 s"},
        {
            "kind": "deposit",
            "material": "NaCl",
            "rate_ml_per_min": "0.2 ML/min",
            "duration_s": "2 min",
        },
    ]
    preparation = actions.record_preparation(
        sample=crystal, instrument=instrument, started_at=T0, steps=steps, actor=member
    )
    sputter, anneal, dose, deposit = preparation.steps.order_by("position")
    # REFERENCES.md §4: 1 µA for 10 min on 1 cm² = 3.745e15 ions/cm² (Φ = I·t/(e·A)).
    assert sputter.fluence_per_cm2 == pytest.approx(3.745e15, rel=1e-3)
    assert sputter.raw_input["energy_ev"] == "1 keV" and sputter.energy_ev == 1000.0
    # CRC (Redhead) S(Ar) = 1.4: a 5e-6 mbar N2-equivalent reading is 3.57e-6 mbar of Ar.
    assert sputter.pressure_mbar_corrected == pytest.approx(5e-6 / 1.4)
    assert anneal.cleans and anneal.temperature_k == 800.0
    # REFERENCES.md §2: 1e-6 mbar × 100 s = 75.0 L, so 1e-8 mbar × 100 s = 0.750 L; S(CO) = 1.0.
    assert dose.exposure_langmuir == pytest.approx(0.7500617, rel=1e-6)
    assert dose.exposure_langmuir_corrected == pytest.approx(dose.exposure_langmuir)
    # REFERENCES.md §2: N2/CO at 1e-6 mbar, 300 K: 2.874e14 cm⁻² s⁻¹; here 1e-8 mbar, 295 K,
    # 100 s: Z ∝ 1/√T, so 2.874e14 × 1e-2 × 100 × √(300/295).
    assert dose.impingement_per_cm2 == pytest.approx(2.874e14 * (300 / 295) ** 0.5, rel=1e-3)
    assert deposit.coverage_ml == pytest.approx(0.4)
    assert deposit.rate_origin == "step"
    assert preparation.steps.first().history.get().history_user == member


def test_a_bad_step_saves_nothing_and_names_every_field(member, instrument, crystal):
    steps = CLEAN_CU + [
        {
            "kind": "sputter",
            "energy_ev": "1 bar",
            "current_a": "15 A",
            "beam_area_cm2": 1,
            "duration_s": "-5 min",
        }
    ]
    with pytest.raises(StepErrors) as caught:
        actions.record_preparation(
            sample=crystal, instrument=instrument, started_at=T0, steps=steps, actor=member
        )
    assert set(caught.value.errors) == {
        "steps.2.energy_ev",
        "steps.2.current_a",
        "steps.2.duration_s",
    }
    assert "cannot be converted to eV" in caught.value.errors["steps.2.energy_ev"]
    assert not Preparation.objects.exists() and not PreparationStep.objects.exists()


def test_thermocouple_reading_is_kept_beside_the_derived_temperature(member, instrument, crystal):
    steps = [
        {
            "kind": "anneal",
            "thermocouple_mv": "20.644 mV",
            "thermocouple_type": "K",
            "duration_s": "10 min",
            "cleans": True,
        }
    ]
    preparation = actions.record_preparation(
        sample=crystal, instrument=instrument, started_at=T0, steps=steps, actor=member
    )
    anneal = preparation.steps.get()
    # IEC 60584-1 / NIST ITS-90 type K: 20.644 mV ↔ 500 °C with the reference junction at 0 °C.
    assert anneal.temperature_k == pytest.approx(773.15, abs=0.01)
    assert (anneal.temperature_source, anneal.thermocouple_mv, anneal.thermocouple_type) == (
        "thermocouple",
        20.644,
        "K",
    )


def test_deposit_from_a_calibrated_source_carries_the_calibration(
    manager, member, instrument, crystal
):
    source = actions.add_deposition_source(
        instrument, name="K-cell 1", material="C60", actor=manager
    )
    calibration = actions.record_calibration(
        source,
        points=[
            {"duration_s": 60, "coverage_ml": 0.101},
            {"duration_s": 120, "coverage_ml": 0.199},
            {"duration_s": 300, "coverage_ml": 0.502},
        ],
        measured_at=T0 - timedelta(days=1),
        actor=member,
    )
    assert calibration.rate_ml_per_min == pytest.approx(0.1, rel=0.02)
    preparation = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0,
        actor=member,
        steps=[{"kind": "deposit", "material": "C60", "source": source.pk, "duration_s": "3 min"}],
    )
    step = preparation.steps.get()
    assert step.calibration == calibration and step.rate_origin == "calibration"
    assert step.coverage_ml == pytest.approx(3 * calibration.rate_ml_per_min)
    assert step.coverage_uncertainty_ml == pytest.approx(3 * calibration.uncertainty_ml_per_min)

    # A deposition before the first calibration has no calibrated rate to use.
    with pytest.raises(StepErrors, match="no rate calibration"):
        actions.record_preparation(
            sample=crystal,
            instrument=instrument,
            started_at=T0 - timedelta(days=2),
            actor=member,
            steps=[
                {"kind": "deposit", "material": "C60", "source": source.pk, "duration_s": "3 min"}
            ],
        )


def test_surface_state_restarts_at_the_last_cleaning(member, instrument, crystal):
    deposit = {
        "kind": "deposit",
        "material": "NaCl",
        "rate_ml_per_min": 0.25,
        "duration_s": "4 min",
    }
    dose = {"kind": "dose", "gas": "Ar", "pressure_mbar": 1e-6, "duration_s": 10}
    actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0,
        steps=CLEAN_CU + [deposit],
        actor=member,
    )
    actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0 + timedelta(hours=5),
        steps=[deposit, dose],
        actor=member,
    )
    state = queries.surface_state(crystal, T0 + timedelta(hours=6))
    assert state.coverage_of("NaCl") == pytest.approx(2.0)  # 1 ML + 1 ML since the anneal
    # CRC S(Ar) = 1.4: 1e-6 mbar × 10 s read = 7.50 L; true exposure 7.50 / 1.4 L.
    assert state.exposures_langmuir["Ar"] == pytest.approx(7.500617 / 1.4, rel=1e-5)
    assert state.cleaned_at == T0 and len(state.preparations) == 2

    actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0 + timedelta(days=1),
        steps=CLEAN_CU,
        actor=member,
    )
    assert queries.surface_state(crystal, T0 + timedelta(days=1, hours=1)).is_clean
    # Looking back at the earlier instant still gives the earlier surface.
    assert queries.surface_state(crystal, T0 + timedelta(hours=1)).coverage_of(
        "NaCl"
    ) == pytest.approx(1.0)


def test_surface_state_costs_a_fixed_number_of_queries(
    member, instrument, crystal, django_assert_max_num_queries
):
    for day in range(5):
        actions.record_preparation(
            sample=crystal,
            instrument=instrument,
            started_at=T0 + timedelta(days=day),
            steps=CLEAN_CU,
            actor=member,
        )
    with django_assert_max_num_queries(2):
        queries.surface_state(crystal, T0 + timedelta(days=10))


def test_recipe_versions_keep_what_each_preparation_followed(member, instrument, crystal):
    v1 = actions.create_recipe(name="Cu(111) clean", steps=CLEAN_CU, actor=member)
    prep = actions.record_preparation(
        sample=crystal, instrument=instrument, started_at=T0, recipe=v1, actor=member
    )
    hotter = [CLEAN_CU[0], {**CLEAN_CU[1], "temperature_k": "850 K"}]
    v2 = actions.revise_recipe(v1, steps=hotter, actor=member)
    assert (v2.name, v2.version, v2.previous) == ("Cu(111) clean", 2, v1)
    prep.refresh_from_db()
    assert prep.recipe == v1 and prep.steps.get(position=1).temperature_k == 800.0
    assert list(queries.current_recipes()) == [v2]
    with pytest.raises(Exception, match="revised already"):
        actions.revise_recipe(v1, steps=hotter, actor=member)


def test_recipe_steps_are_checked_when_saved(member):
    with pytest.raises(StepErrors) as caught:
        actions.create_recipe(
            name="bad", steps=[{"kind": "dose", "gas": "CO", "duration_s": 5}], actor=member
        )
    assert caught.value.errors == {"steps.0.pressure_mbar": "is required"}


def test_repeat_the_last_preparation_from_its_template(member, instrument, crystal):
    steps = [
        {
            "kind": "anneal",
            "thermocouple_mv": "20.644 mV",
            "thermocouple_type": "K",
            "duration_s": "10 min",
            "cleans": True,
        }
    ] + CLEAN_CU[:1]
    first = actions.record_preparation(
        sample=crystal, instrument=instrument, started_at=T0, steps=steps, actor=member
    )
    template = [queries.step_as_template(step) for step in first.steps.order_by("position")]
    again = actions.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0 + timedelta(days=1),
        steps=template,
        actor=member,
    )
    a, b = (
        list(
            p.steps.order_by("position").values(
                "kind", "temperature_k", "fluence_per_cm2", "cleans"
            )
        )
        for p in (first, again)
    )
    assert a == b


def test_outsiders_cannot_log(outsider, instrument, member):
    crystal = actions.create_sample(name="Ag(100) #1", substrate="Ag(100)", actor=member)
    from labbook.accounts.permissions import PermissionDenied

    with pytest.raises(PermissionDenied):
        actions.record_preparation(
            sample=crystal, instrument=instrument, started_at=T0, steps=CLEAN_CU, actor=outsider
        )


def test_retired_records_take_no_new_preparations(member, instrument, crystal):
    actions.retire(crystal, actor=member)
    with pytest.raises(StepErrors) as caught:
        actions.record_preparation(
            sample=crystal, instrument=instrument, started_at=T0, steps=CLEAN_CU, actor=member
        )
    assert list(caught.value.errors) == ["sample"]
    assert crystal.history.first().retired_at is not None  # the retirement is in the history


@pytest.mark.postgres
@pytest.mark.django_db(transaction=True)
def test_the_same_preparation_sent_twice_at_once_is_stored_once(member, instrument, monkeypatch):
    """Two requests with the same preparation running at the same time (a client that timed
    out and retried while the first still ran) both pass the twin check; the database's
    constraint stores one, and the other gets the same clear error as a late duplicate."""
    import threading

    from django.db import connection, connections

    from labbook.samples import actions as sample_actions
    from labbook.samples.models import Preparation, PreparationStep
    from labbook.samples.steps import StepErrors

    if connection.vendor != "postgresql":
        pytest.skip("needs PostgreSQL (concurrent transactions)")
    crystal = sample_actions.create_sample(name="Ag(111) #2", substrate="Ag(111)", actor=member)
    both_checked = threading.Barrier(2, timeout=20)
    normalise = sample_actions.normalise_steps

    def normalise_after_both_checked(*args, **kwargs):
        both_checked.wait()  # each request has found no twin before either inserts
        return normalise(*args, **kwargs)

    monkeypatch.setattr(sample_actions, "normalise_steps", normalise_after_both_checked)
    outcomes: list[object] = []

    def send() -> None:
        try:
            outcomes.append(
                sample_actions.record_preparation(
                    sample=crystal,
                    instrument=instrument,
                    started_at=datetime(2026, 3, 2, 9, 0, tzinfo=UTC),
                    steps=[{"kind": "anneal", "temperature_k": 700, "duration_s": 300}],
                    actor=member,
                )
            )
        except StepErrors as exc:
            outcomes.append(exc)
        finally:
            connections.close_all()

    threads = [threading.Thread(target=send) for _ in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(30)
    stored = [o for o in outcomes if isinstance(o, Preparation)]
    refused = [o for o in outcomes if isinstance(o, StepErrors)]
    assert len(stored) == 1 and len(refused) == 1, outcomes
    assert f"already has a preparation at this time (#{stored[0].pk})" in str(
        refused[0].errors["started_at"]
    )
    assert Preparation.objects.filter(sample=crystal).count() == 1
    assert PreparationStep.objects.filter(preparation__sample=crystal).count() == 1
