"""The samples part of the JSON API: samples, transfers, recipes, deposition sources,
preparations with their derived doses, and a sample's history and surface state."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext

from labbook.samples import actions, queries
from labbook.samples.models import (
    DepositionSource,
    Preparation,
    PreparationStep,
    RateCalibration,
    Recipe,
    Sample,
    Transfer,
)
from labbook.samples.schemas import SurfaceStateOut

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)

SPUTTER = {
    "kind": "sputter",
    "gas": "Ar",
    "energy_ev": "1 keV",
    "current_a": "1 uA",
    "beam_area_cm2": 1,
    "duration_s": "10 min",
    "pressure_mbar": "5e-6 mbar",
}
ANNEAL = {
    "kind": "anneal",
    "temperature_k": "800 K",
    "duration_s": "15 min",
    "method": "resistive",
    "cleans": True,
}
CLEAN_CU = [SPUTTER, ANNEAL]


def iso(t: datetime) -> str:
    return t.isoformat()


def parse_time(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def rows() -> dict[str, int]:
    """Row counts of everything a refused or invalid request must not have written."""
    return {
        model.__name__: model.objects.count()
        for model in (
            Sample,
            Transfer,
            Recipe,
            DepositionSource,
            RateCalibration,
            Preparation,
            PreparationStep,
        )
    }


@pytest.fixture
def crystal(member):
    return actions.create_sample(name="Cu(111) #3", substrate="Cu(111)", actor=member)


def preparation_body(crystal, instrument, steps=CLEAN_CU, **extra):
    return {
        "sample": crystal.pk,
        "instrument": instrument.pk,
        "started_at": iso(T0),
        "steps": steps,
        **extra,
    }


def error_fields(response) -> set[str]:
    return {error["field"] for error in response.json()["errors"]}


def error_message(response, field: str) -> str:
    return next(e["message"] for e in response.json()["errors"] if e["field"] == field)


# --- samples ------------------------------------------------------------------------------------


def test_new_sample_answers_with_its_derived_monolayer(member, api_as):
    api = api_as(member)
    response = api.post(
        "/samples", {"name": "Cu(111) #3", "substrate": "Cu(111)", "supplier": "crystal works"}
    )
    assert response.status_code == 201, response.content
    body = response.json()
    assert (body["material"], body["facet"], body["supplier"]) == ("Cu", "111", "crystal works")
    # REFERENCES.md §6: fcc(111) n = 4/(√3 a²) with Cu a = 3.6149 Å (CRC, King) → 1.767e15 cm⁻².
    assert body["monolayer_density_per_cm2"] == pytest.approx(1.767e15, rel=5e-4)
    fetched = api.get(f"/samples/{body['id']}")
    assert fetched.status_code == 200 and fetched.json() == body


def test_a_surface_the_tables_do_not_know_takes_the_density_given(member, api_as):
    response = api_as(member).post(
        "/samples",
        {"name": "HOPG #1", "substrate": "HOPG", "monolayer_density_per_cm2": "3.82e15 cm^-2"},
    )
    assert response.status_code == 201, response.content
    body = response.json()
    assert body["material"] == "" and body["monolayer_density_per_cm2"] == pytest.approx(3.82e15)


def test_sample_list_filters_by_text_and_hides_retired_ones(member, api_as):
    for name, substrate in (("Cu(111) #3", "Cu(111)"), ("Ag(100) #1", "Ag(100)")):
        actions.create_sample(name=name, substrate=substrate, actor=member)
    old = actions.create_sample(name="Cu(111) #1", substrate="Cu(111)", actor=member)
    actions.retire(old, actor=member)
    api = api_as(member)
    assert [s["name"] for s in api.get("/samples").json()] == ["Ag(100) #1", "Cu(111) #3"]
    assert [s["name"] for s in api.get("/samples", q="cu(1").json()] == ["Cu(111) #3"]
    with_retired = api.get("/samples", q="Cu", include_retired="true").json()
    assert [(s["name"], s["retired_at"] is not None) for s in with_retired] == [
        ("Cu(111) #1", True),
        ("Cu(111) #3", False),
    ]
    assert api.get("/samples/999999").status_code == 404


def test_sample_names_are_unique(member, crystal, api_as):
    response = api_as(member).post("/samples", {"name": "Cu(111) #3", "substrate": "Cu(111)"})
    assert response.status_code == 422
    assert error_fields(response) == {"name"}
    assert Sample.objects.count() == 1


# --- preparations: derived quantities ---------------------------------------------------------


def test_preparation_answer_carries_the_derived_doses(member, instrument, crystal, api_as):
    steps = CLEAN_CU + [
        {
            "kind": "dose",
            "gas": "CO",
            "pressure_mbar": "1e-6 mbar",
            "duration_s": "100 s",
            "chamber_temperature_k": "300 K",
        },
        {"kind": "dose", "gas": "argon", "pressure_mbar": 1e-6, "duration_s": 100},
        {
            "kind": "deposit",
            "material": "NaCl",
            "rate_ml_per_min": "0.2 ML/min",
            "duration_s": "2 min",
            "sample_temperature_k": "10 degC",
        },
    ]
    response = api_as(member).post(
        "/preparations",
        preparation_body(crystal, instrument, steps, ended_at=iso(T0 + timedelta(hours=1))),
    )
    assert response.status_code == 201, response.content
    body = response.json()
    assert (body["sample"], body["instrument"], body["operator"], body["recipe"]) == (
        crystal.pk,
        instrument.pk,
        member.pk,
        None,
    )
    assert parse_time(body["started_at"]) == T0
    sputter, anneal, co, argon, deposit = body["steps"]
    assert [s["position"] for s in body["steps"]] == [0, 1, 2, 3, 4]
    assert all(isinstance(s["id"], int) for s in body["steps"])

    # Raw input kept beside the canonical values (eV, A, s, mbar).
    assert (sputter["energy_ev"], sputter["current_a"], sputter["duration_s"]) == (1000, 1e-6, 600)
    assert sputter["raw_input"]["energy_ev"] == "1 keV"
    # REFERENCES.md §4: Φ = I·t/(e·A); 1 µA for 10 min on 1 cm² = 3.745e15 ions/cm².
    assert sputter["fluence_per_cm2"] == pytest.approx(3.745e15, rel=1e-4)
    # REFERENCES.md §3, CRC Handbook (Redhead) S(Ar) = 1.4: 5e-6 mbar read is 5e-6/1.4 of Ar.
    assert sputter["pressure_mbar_corrected"] == pytest.approx(5e-6 / 1.4, rel=1e-9)

    assert anneal["cleans"] is True and anneal["temperature_k"] == 800.0
    assert anneal["duration_s"] == 900.0 and anneal["temperature_source"] == "given"

    # REFERENCES.md §2 worked dose (Wikipedia "Langmuir (unit)"): 1e-6 mbar × 100 s = 75.0 L.
    assert co["exposure_langmuir"] == pytest.approx(75.0, rel=1e-3)
    assert co["exposure_langmuir_corrected"] == pytest.approx(75.0, rel=1e-3)  # CRC S(CO) = 1.0
    # REFERENCES.md §2, Hertz–Knudsen Z = p/√(2πmkT): N2/CO at 1e-6 mbar, 300 K,
    # 2.874e14 cm⁻² s⁻¹, so 100 s give 2.874e16 cm⁻².
    assert co["impingement_per_cm2"] == pytest.approx(2.874e14 * 100, rel=1e-3)
    assert argon["gas"] == "Ar" and argon["gauge_gas"] == "N2"
    # CRC (Redhead) S(Ar) = 1.4: the true exposure is the gauge's 75.0 L divided by 1.4.
    assert argon["exposure_langmuir"] == pytest.approx(75.0, rel=1e-3)
    assert argon["exposure_langmuir_corrected"] == pytest.approx(75.0 / 1.4, rel=1e-3)
    assert argon["pressure_mbar_corrected"] == pytest.approx(1e-6 / 1.4, rel=1e-9)

    assert deposit["coverage_ml"] == pytest.approx(0.4)  # 0.2 ML/min × 2 min
    assert deposit["coverage_uncertainty_ml"] is None and deposit["rate_origin"] == "step"
    assert deposit["sample_temperature_k"] == pytest.approx(283.15)

    stored = PreparationStep.objects.get(pk=co["id"])
    assert stored.exposure_langmuir == co["exposure_langmuir"]
    assert api_as(member).get(f"/preparations/{body['id']}").json() == body


def test_deposit_from_a_calibrated_source(manager, member, instrument, crystal, api_as):
    source = api_as(manager).post(
        "/deposition-sources",
        {"instrument": instrument.pk, "name": "K-cell 1", "material": "C60"},
    )
    assert source.status_code == 201, source.content
    source_id = source.json()["id"]
    assert source.json()["calibration"] is None
    api = api_as(member)
    fit = api.post(
        f"/deposition-sources/{source_id}/calibrations",
        {
            "points": [
                {"duration_s": "1 min", "coverage_ml": 0.101},
                {"duration_s": 120, "coverage_ml": "0.199 ML"},
                {"duration_s": "5 min", "coverage_ml": 0.502},
            ],
            "measured_at": iso(T0 - timedelta(days=1)),
        },
    )
    assert fit.status_code == 201, fit.content
    calibration = fit.json()
    # Least squares through the origin of these points: R = Σct/Σt² (t in min) = 0.1003 ML/min.
    assert calibration["rate_ml_per_min"] == pytest.approx(
        (0.101 * 1 + 0.199 * 2 + 0.502 * 5) / (1 + 4 + 25), rel=1e-9
    )
    assert 0 < calibration["uncertainty_ml_per_min"] < 0.01
    assert [p["duration_s"] for p in calibration["points"]] == [60, 120, 300]
    listed = api.get("/deposition-sources", instrument=instrument.pk).json()
    assert [(s["id"], s["calibration"]["id"]) for s in listed] == [(source_id, calibration["id"])]

    response = api.post(
        "/preparations",
        preparation_body(
            crystal,
            instrument,
            [{"kind": "deposit", "material": "C60", "source": source_id, "duration_s": "3 min"}],
        ),
    )
    assert response.status_code == 201, response.content
    (step,) = response.json()["steps"]
    assert (step["source"], step["calibration"], step["rate_origin"]) == (
        source_id,
        calibration["id"],
        "calibration",
    )
    assert step["coverage_ml"] == pytest.approx(3 * calibration["rate_ml_per_min"])
    assert step["coverage_uncertainty_ml"] == pytest.approx(
        3 * calibration["uncertainty_ml_per_min"]
    )


def test_calibration_settings_are_read_in_the_models_unit(manager, instrument, api_as):
    source = actions.add_deposition_source(
        instrument, name="e-beam 1", material="Fe", kind="electron_beam", actor=manager
    )
    api = api_as(manager)
    missing = api.post(
        f"/deposition-sources/{source.pk}/calibrations",
        {
            "model": "proportional",
            "measured_at": iso(T0),
            "points": [
                {"setting": "20 nA", "duration_s": 60, "coverage_ml": 0.1},
                {"duration_s": 60, "coverage_ml": 0.2},
                {"setting": "40 mbar", "duration_s": 60, "coverage_ml": 0.2},
            ],
        },
    )
    assert missing.status_code == 422
    assert error_fields(missing) == {"points.1.setting", "points.2.setting"}
    fit = api.post(
        f"/deposition-sources/{source.pk}/calibrations",
        {
            "model": "proportional",
            "measured_at": iso(T0),
            "points": [
                {"setting": "20 nA", "duration_s": 60, "coverage_ml": 0.1},
                {"setting": 4e-8, "duration_s": 60, "coverage_ml": 0.2},
            ],
        },
    )
    assert fit.status_code == 201, fit.content
    # coverage = k·I·t through these two exact points: k = 0.1 ML / (20 nA · 1 min).
    assert fit.json()["reference_setting"] == pytest.approx(3e-8)
    assert fit.json()["rate_ml_per_min"] == pytest.approx(0.1 / 20e-9 * 3e-8)
    assert RateCalibration.objects.count() == 1


# --- preparations: bad input ----------------------------------------------------------------


def test_bad_steps_are_named_one_by_one_and_nothing_is_saved(member, instrument, crystal, api_as):
    steps = [
        {**SPUTTER, "duration_s": 0, "energy_ev": "50 keV", "current_a": "2 A"},
        {**ANNEAL, "temperature_k": "0 K", "duration_s": "-5 min"},
        {"kind": "dose", "gas": "CO", "pressure_mbar": "2 mbar", "duration_s": 10},
        {"kind": "dose", "gas": "Unobtainium", "pressure_mbar": 1e-6, "duration_s": 10},
        {"kind": "dose", "gas": "CO", "pressure_mbar": "1e-6 blorp", "duration_s": 10},
        {**ANNEAL, "duration_s": "10 K"},
        {**SPUTTER, "energy_ev": "-1 keV", "beam_area_cm2": "-1 cm^2"},
        {"kind": "bake", "duration_s": 10},
        {**ANNEAL, "temperture_k": 800},
    ]
    before = rows()
    response = api_as(member).post("/preparations", preparation_body(crystal, instrument, steps))
    assert response.status_code == 422
    assert response.json()["detail"] == "the request has invalid fields"
    assert error_fields(response) == {
        "steps.0.duration_s",
        "steps.0.energy_ev",
        "steps.0.current_a",
        "steps.1.temperature_k",
        "steps.1.duration_s",
        "steps.2.pressure_mbar",
        "steps.3.gas",
        "steps.4.pressure_mbar",
        "steps.5.duration_s",
        "steps.6.energy_ev",
        "steps.6.beam_area_cm2",
        "steps.7.kind",
        "steps.8.temperture_k",
    }
    assert "more than 0 s" in error_message(response, "steps.0.duration_s")
    assert "10 keV" in error_message(response, "steps.0.energy_ev")
    assert "unit slip" in error_message(response, "steps.0.current_a")
    assert "more than 0 K" in error_message(response, "steps.1.temperature_k")
    assert "below 1 mbar" in error_message(response, "steps.2.pressure_mbar")
    assert "Unobtainium" in error_message(response, "steps.3.gas")
    assert "blorp" in error_message(response, "steps.4.pressure_mbar")
    assert "cannot be converted to s" in error_message(response, "steps.5.duration_s")
    assert rows() == before


def test_bad_references_and_times_are_named(member, instrument, crystal, api_as):
    api = api_as(member)
    before = rows()
    unknown = api.post(
        "/preparations",
        preparation_body(crystal, instrument, sample=999999, recipe=999998, operator=999997),
    )
    assert unknown.status_code == 422
    assert error_fields(unknown) == {"sample", "recipe", "operator"}
    assert "no sample with id 999999" in error_message(unknown, "sample")

    naive = api.post(
        "/preparations", preparation_body(crystal, instrument, started_at="2026-03-02T09:00:00")
    )
    assert naive.status_code == 422 and error_fields(naive) == {"started_at"}
    assert "time zone" in error_message(naive, "started_at")

    backwards = api.post(
        "/preparations", preparation_body(crystal, instrument, ended_at=iso(T0 - timedelta(1)))
    )
    assert backwards.status_code == 422 and error_fields(backwards) == {"ended_at"}

    no_steps = api.post("/preparations", preparation_body(crystal, instrument, steps=None))
    assert no_steps.status_code == 422 and error_fields(no_steps) == {"steps"}

    actions.retire(crystal, actor=member)
    retired = api.post("/preparations", preparation_body(crystal, instrument))
    assert retired.status_code == 422 and "retired" in error_message(retired, "sample")
    assert rows() == before


def test_outsider_cannot_be_the_operator(member, outsider, manager, instrument, crystal, api_as):
    api = api_as(member)
    refused = api.post("/preparations", preparation_body(crystal, instrument, operator=outsider.pk))
    assert refused.status_code == 422 and error_fields(refused) == {"operator"}
    logged = api.post("/preparations", preparation_body(crystal, instrument, operator=manager.pk))
    assert logged.status_code == 201, logged.content
    assert logged.json()["operator"] == manager.pk
    assert Preparation.objects.get().history.get().history_user == member


# --- permissions ------------------------------------------------------------------------------


def test_anonymous_and_outsiders_are_refused(outsider, instrument, crystal, api_as):
    before = rows()
    for api, status in ((api_as(None), 401), (api_as(outsider), 403)):
        assert api.get("/samples").status_code == status
        assert api.get(f"/samples/{crystal.pk}/history").status_code == status
        assert api.get("/preparations").status_code == status
        response = api.post("/preparations", preparation_body(crystal, instrument))
        assert response.status_code == status
        assert api.post("/samples", {"name": "X", "substrate": "Cu(111)"}).status_code == status
    assert rows() == before


def test_read_only_token_reads_but_cannot_log(member, instrument, crystal, api_as):
    api = api_as(member, read_only=True)
    assert api.get("/samples").status_code == 200
    assert api.get("/preparations").status_code == 200
    before = rows()
    for path, body in (
        ("/preparations", preparation_body(crystal, instrument)),
        ("/samples", {"name": "Ag(100) #1", "substrate": "Ag(100)"}),
        ("/recipes", {"name": "clean", "steps": CLEAN_CU}),
        (f"/samples/{crystal.pk}/transfers", {"location": "load_lock", "at": iso(T0)}),
    ):
        response = api.post(path, body)
        assert response.status_code == 403, path
        assert response.json()["detail"] == "this token is read-only"
    assert rows() == before


def test_instrument_token_logs_and_moves_only_on_its_instrument(
    member, instrument, other_instrument, crystal, api_as
):
    api = api_as(member, instrument=instrument)
    assert api.post("/preparations", preparation_body(crystal, instrument)).status_code == 201
    before = rows()
    refused = api.post("/preparations", preparation_body(crystal, other_instrument))
    assert refused.status_code == 403
    assert f"instrument {instrument.pk}" in refused.json()["detail"]
    transfers = f"/samples/{crystal.pk}/transfers"
    here = {"location": "microscope_stage", "at": iso(T0)}
    elsewhere = api.post(transfers, {**here, "instrument": other_instrument.pk})
    assert elsewhere.status_code == 403
    assert api.post(transfers, here).status_code == 403  # a move with no instrument is lab-wide
    # Samples and recipes belong to no instrument: out of an instrument token's reach.
    assert api.post("/samples", {"name": "Ag(100) #1", "substrate": "Ag(100)"}).status_code == 403
    assert api.post("/recipes", {"name": "clean", "steps": CLEAN_CU}).status_code == 403
    assert rows() == before
    moved = api.post(transfers, {**here, "instrument": instrument.pk})
    assert moved.status_code == 201, moved.content
    assert (moved.json()["instrument"], moved.json()["moved_by"]) == (instrument.pk, member.pk)


def test_deposition_sources_are_set_up_by_managers(
    manager, member, instrument, other_instrument, api_as
):
    body = {"instrument": instrument.pk, "name": "K-cell 1", "material": "NaCl"}
    refused = api_as(member).post("/deposition-sources", body)
    assert refused.status_code == 403
    assert refused.json()["detail"] == "only lab managers may do this"
    scoped_elsewhere = api_as(manager, instrument=other_instrument)
    assert scoped_elsewhere.post("/deposition-sources", body).status_code == 403
    assert DepositionSource.objects.count() == 0
    created = api_as(manager, instrument=instrument).post("/deposition-sources", body)
    assert created.status_code == 201, created.content
    assert (created.json()["instrument"], created.json()["kind"]) == (instrument.pk, "knudsen_cell")
    again = api_as(manager).post("/deposition-sources", body)
    assert again.status_code == 422  # one name per instrument
    assert DepositionSource.objects.count() == 1
    # Calibrating needs write access to the source's instrument, not a manager.
    calibrate = f"/deposition-sources/{created.json()['id']}/calibrations"
    fit = {"points": [{"duration_s": 60, "coverage_ml": 0.1}] * 2, "measured_at": iso(T0)}
    assert api_as(member, instrument=other_instrument).post(calibrate, fit).status_code == 403
    assert api_as(member).post(calibrate, fit).status_code == 201


# --- recipes --------------------------------------------------------------------------------------


def test_follow_a_recipe_unchanged_then_revise_it(member, instrument, crystal, api_as):
    api = api_as(member)
    created = api.post(
        "/recipes", {"name": "Cu(111) clean", "substrate": "Cu(111)", "steps": CLEAN_CU}
    )
    assert created.status_code == 201, created.content
    v1 = created.json()
    assert (v1["version"], v1["previous"], v1["newest"]) == (1, None, True)
    assert v1["steps"][0]["energy_ev"] == 1000.0 and v1["steps"][0]["duration_s"] == 600.0
    assert v1["steps_as_given"][0]["energy_ev"] == "1 keV"

    followed = api.post(
        "/preparations", preparation_body(crystal, instrument, steps=None, recipe=v1["id"])
    )
    assert followed.status_code == 201, followed.content
    assert followed.json()["recipe"] == v1["id"]
    sputter, anneal = followed.json()["steps"]
    # REFERENCES.md §4: 1 µA · 10 min on 1 cm² = 3.745e15 ions/cm².
    assert sputter["fluence_per_cm2"] == pytest.approx(3.745e15, rel=1e-4)
    assert anneal["temperature_k"] == 800.0 and anneal["cleans"] is True

    hotter = [SPUTTER, {**ANNEAL, "temperature_k": "850 K"}]
    revised = api.post(f"/recipes/{v1['id']}/revisions", {"steps": hotter})
    assert revised.status_code == 201, revised.content
    v2 = revised.json()
    assert (v2["name"], v2["version"], v2["previous"], v2["newest"]) == (
        "Cu(111) clean",
        2,
        v1["id"],
        True,
    )
    assert v2["substrate"] == "Cu(111)"  # not given, so kept
    assert v2["steps"][1]["temperature_k"] == 850.0
    assert [r["version"] for r in api.get("/recipes").json()] == [2]
    versions = api.get("/recipes", all_versions="true").json()
    assert [(r["version"], r["newest"]) for r in versions] == [(2, True), (1, False)]

    stale = api.post(f"/recipes/{v1['id']}/revisions", {"description": "hotter"})
    assert stale.status_code == 422 and error_fields(stale) == {"recipe"}
    assert "revised already" in error_message(stale, "recipe")
    # The preparation keeps what it followed.
    again = api.get(f"/preparations/{followed.json()['id']}").json()
    assert again["recipe"] == v1["id"] and again["steps"][1]["temperature_k"] == 800.0
    assert api.get(f"/recipes/{v1['id']}").json()["newest"] is False
    assert api.get("/recipes/999999").status_code == 404
    assert Recipe.objects.count() == 2


def test_recipe_steps_and_names_are_checked(member, api_as):
    api = api_as(member)
    bad = api.post(
        "/recipes", {"name": "CO dose", "steps": [{"kind": "dose", "gas": "CO", "duration_s": 5}]}
    )
    assert bad.status_code == 422
    assert bad.json()["errors"] == [{"field": "steps.0.pressure_mbar", "message": "is required"}]
    assert api.post("/recipes", {"name": "clean", "steps": CLEAN_CU}).status_code == 201
    twice = api.post("/recipes", {"name": "clean", "steps": CLEAN_CU})
    assert twice.status_code == 422 and error_fields(twice) == {"name"}
    assert Recipe.objects.count() == 1


# --- history and surface state ------------------------------------------------------------------

NACL_1ML = {"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.25, "duration_s": "4 min"}
CO_DOSE = {"kind": "dose", "gas": "CO", "pressure_mbar": 1e-6, "duration_s": 100}


def log(member, crystal, instrument, at, steps):
    return actions.record_preparation(
        sample=crystal, instrument=instrument, started_at=at, steps=steps, actor=member
    )


def test_history_has_preparations_transfers_and_the_surface_after_each(
    member, instrument, crystal, api_as
):
    first = log(member, crystal, instrument, T0, CLEAN_CU + [NACL_1ML])
    actions.transfer_sample(
        crystal, location="microscope_stage", at=T0 + timedelta(hours=2), actor=member
    )
    second = log(member, crystal, instrument, T0 + timedelta(hours=5), [NACL_1ML, CO_DOSE])
    api = api_as(member)

    history = api.get(f"/samples/{crystal.pk}/history")
    assert history.status_code == 200, history.content
    body = history.json()
    assert body["sample"]["id"] == crystal.pk
    assert [(e["kind"], parse_time(e["at"])) for e in body["entries"]] == [
        ("preparation", T0),
        ("transfer", T0 + timedelta(hours=2)),
        ("preparation", T0 + timedelta(hours=5)),
    ]
    after_first, transfer, after_second = body["entries"]
    assert [s["kind"] for s in after_first["preparation"]["steps"]] == [
        "sputter",
        "anneal",
        "deposit",
    ]
    assert after_first["preparation"]["steps"][0]["fluence_per_cm2"] == pytest.approx(
        3.745e15, 1e-4
    )
    assert transfer["transfer"]["location"] == "microscope_stage"
    state = after_first["surface_state"]
    assert state["coverages"] == [
        {
            "material": "NaCl",
            "coverage_ml": 1.0,
            "uncertainty_ml": None,
            "definition": "substrate_atom",
        }
    ]
    assert parse_time(state["cleaned_at"]) == T0 and state["steps_since_cleaning"] == 1
    assert state["preparations"] == [first.pk] and state["is_clean"] is False
    state = after_second["surface_state"]
    assert state["coverages"][0]["coverage_ml"] == pytest.approx(2.0)
    # REFERENCES.md §2: 1e-6 mbar × 100 s = 75.0 L; CRC S(CO) = 1.0, so corrected = read.
    assert state["exposures_langmuir"] == {"CO": pytest.approx(75.0, rel=1e-3)}
    assert state["steps_since_cleaning"] == 3
    assert state["preparations"] == [first.pk, second.pk]
    assert body["surface_state"] == {**state, "at": body["surface_state"]["at"]}  # now

    between = api.get(f"/samples/{crystal.pk}/history", at=iso(T0 + timedelta(hours=3)))
    assert between.json()["surface_state"]["coverages"][0]["coverage_ml"] == pytest.approx(1.0)
    assert parse_time(between.json()["surface_state"]["at"]) == T0 + timedelta(hours=3)
    # An unencoded "+01:00" in a query string arrives as " 01:00"; it still means +01:00.
    unencoded = api.get(f"/samples/{crystal.pk}/history", at="2026-03-02T13:00:00 01:00")
    assert parse_time(unencoded.json()["surface_state"]["at"]) == T0 + timedelta(hours=3)
    before_all = api.get(f"/samples/{crystal.pk}/history", at="2026-03-01T00:00:00Z").json()
    assert before_all["surface_state"]["cleaned_at"] is None
    assert before_all["surface_state"]["steps_since_cleaning"] == 0
    naive = api.get(f"/samples/{crystal.pk}/history", at="2026-03-02T12:00:00")
    # labbook/api.py names a query parameter by its place: "query.at" (a body field has none).
    assert naive.status_code == 422 and error_fields(naive) == {"query.at"}
    assert "time zone" in error_message(naive, "query.at")
    assert api.get("/samples/999999/history").status_code == 404


def busy_history(manager, member, instrument, crystal, preparations: int):
    """A realistic mix: cleanings, calibrated and hand-typed deposits, doses, transfers."""
    source = actions.add_deposition_source(instrument, name="K-cell", material="C60", actor=manager)
    actions.record_calibration(
        source,
        points=[
            {"duration_s": 60, "coverage_ml": 0.11},
            {"duration_s": 120, "coverage_ml": 0.19},
            {"duration_s": 240, "coverage_ml": 0.41},
        ],
        measured_at=T0 - timedelta(days=1),
        actor=member,
    )
    c60 = {"kind": "deposit", "material": "C60", "source": source.pk, "duration_s": "2 min"}
    plans = [CLEAN_CU + [c60], [c60, CO_DOSE], [NACL_1ML], CLEAN_CU, [CO_DOSE, c60, NACL_1ML]]
    for index in range(preparations):
        at = T0 + timedelta(hours=6 * index)
        log(member, crystal, instrument, at, plans[index % len(plans)])
        actions.transfer_sample(
            crystal, location="microscope_stage", at=at + timedelta(hours=1), actor=member
        )


def test_each_surface_after_a_preparation_is_the_surface_state_at_its_time(
    manager, member, instrument, crystal, api_as
):
    busy_history(manager, member, instrument, crystal, 10)
    body = api_as(member).get(f"/samples/{crystal.pk}/history").json()
    entries = [e for e in body["entries"] if e["kind"] == "preparation"]
    assert len(entries) == 10
    for entry in entries:
        at = parse_time(entry["preparation"]["started_at"])
        expected = SurfaceStateOut.from_orm(queries.surface_state(crystal, at)).model_dump()
        got = entry["surface_state"]
        assert parse_time(got["at"]) == expected["at"]
        assert (None if got["cleaned_at"] is None else parse_time(got["cleaned_at"])) == (
            expected["cleaned_at"]
        )
        assert got["coverages"] == [
            {**c, "coverage_ml": pytest.approx(c["coverage_ml"])} for c in expected["coverages"]
        ]
        for name in ("exposures_langmuir", "anneal_time_s", "steps_since_cleaning", "is_clean"):
            assert got[name] == pytest.approx(expected[name]), name
        assert got["preparations"] == expected["preparations"]
    # Calibrated coverages carry an uncertainty; mixing in a hand-typed rate makes it unknown.
    last = entries[4]["surface_state"]["coverages"]
    assert {c["material"]: c["uncertainty_ml"] is None for c in last} == {
        "C60": False,
        "NaCl": True,
    }


def test_history_costs_the_same_queries_for_two_or_ten_preparations(
    manager, member, instrument, crystal, api_as, django_assert_max_num_queries
):
    short = actions.create_sample(name="Cu(111) #4", substrate="Cu(111)", actor=member)
    busy_history(manager, member, instrument, crystal, 10)
    for index in range(2):
        log(member, short, instrument, T0 + timedelta(days=index), CLEAN_CU + [NACL_1ML])
    api = api_as(member)
    api.get("/samples")  # the token's first use records when it was used: not the history's cost
    counts = {}
    for sample in (short, crystal):
        with CaptureQueriesContext(connection) as captured:
            assert api.get(f"/samples/{sample.pk}/history").status_code == 200
        counts[sample.pk] = len(captured)
    assert counts[short.pk] == counts[crystal.pk]
    # token + groups, sample, preparations, their steps, transfers, surface state now (2).
    with django_assert_max_num_queries(8):
        api.get(f"/samples/{crystal.pk}/history")


# --- listing preparations -----------------------------------------------------------------------


def test_preparations_are_listed_newest_first_in_pages(
    member, instrument, other_instrument, crystal, api_as
):
    other = actions.create_sample(name="Ag(100) #1", substrate="Ag(100)", actor=member)
    logged = [log(member, crystal, instrument, T0 + timedelta(hours=h), CLEAN_CU) for h in range(5)]
    log(member, other, other_instrument, T0 + timedelta(hours=2, minutes=30), CLEAN_CU)
    api = api_as(member)

    everything = api.get("/preparations").json()
    assert everything["count"] == 6
    times = [parse_time(p["started_at"]) for p in everything["items"]]
    assert times == sorted(times, reverse=True)

    pages = [
        api.get("/preparations", sample=crystal.pk, limit=2, offset=o).json() for o in (0, 2, 4)
    ]
    assert [page["count"] for page in pages] == [5, 5, 5]
    ids = [p["id"] for page in pages for p in page["items"]]
    assert ids == [p.pk for p in reversed(logged)]
    assert all(len(p["steps"]) == 2 for page in pages for p in page["items"])

    window = api.get(
        "/preparations",
        instrument=instrument.pk,
        since=iso(T0 + timedelta(hours=1)),
        until=iso(T0 + timedelta(hours=3)),
    ).json()
    # since is inclusive, until exclusive: the 1 h and 2 h preparations, not the 3 h one.
    assert [p["id"] for p in window["items"]] == [logged[2].pk, logged[1].pk]
    assert api.get("/preparations", until="2026-03-02T12:00").status_code == 422
    assert api.get("/preparations/999999").status_code == 404


def test_listing_preparations_costs_a_fixed_number_of_queries(
    member, instrument, crystal, api_as, django_assert_max_num_queries
):
    for hour in range(12):
        log(member, crystal, instrument, T0 + timedelta(hours=hour), CLEAN_CU + [CO_DOSE])
    api = api_as(member)
    api.get("/samples")
    # token + groups, count, the page, its steps.
    with django_assert_max_num_queries(5):
        assert len(api.get("/preparations", limit=10).json()["items"]) == 10


# --- transfers --------------------------------------------------------------------------------


def test_transfers_take_a_known_place_and_an_aware_time(member, instrument, crystal, api_as):
    api = api_as(member)
    path = f"/samples/{crystal.pk}/transfers"
    moved = api.post(path, {"location": "load_lock", "at": "2026-03-02T10:00:00+01:00"})
    assert moved.status_code == 201, moved.content
    assert parse_time(moved.json()["at"]) == datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
    assert moved.json()["sample"] == crystal.pk
    bad = api.post(path, {"location": "the fridge", "at": "2026-03-02T10:00:00"})
    assert bad.status_code == 422 and error_fields(bad) == {"location", "at"}
    unknown = api.post(path, {"location": "load_lock", "at": iso(T0), "instrument": 999999})
    assert unknown.status_code == 422 and error_fields(unknown) == {"instrument"}
    assert (
        api.post("/samples/999999/transfers", {"location": "load_lock", "at": iso(T0)}).status_code
        == 404
    )
    assert Transfer.objects.count() == 1


# --- the API document -------------------------------------------------------------------------


def test_openapi_document_describes_the_samples_endpoints(member, api_as):
    response = api_as(member).get("/openapi.json")
    assert response.status_code == 200
    document = response.json()
    for path in (
        "/api/v1/samples",
        "/api/v1/samples/{sample_id}/history",
        "/api/v1/samples/{sample_id}/transfers",
        "/api/v1/recipes",
        "/api/v1/recipes/{recipe_id}/revisions",
        "/api/v1/deposition-sources",
        "/api/v1/deposition-sources/{source_id}/calibrations",
        "/api/v1/preparations",
        "/api/v1/preparations/{preparation_id}",
    ):
        assert path in document["paths"], path
    dose = document["components"]["schemas"]["DoseStepOut"]["properties"]
    assert {"exposure_langmuir", "exposure_langmuir_corrected", "impingement_per_cm2"} <= set(dose)
