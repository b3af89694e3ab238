"""Each dataset of the history in conftest resolves to the right preparation, surface, tip state
and nearest readings; the neighbours share what they claim to share; the query count does not
grow with the history."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext

from labbook.provenance.queries import NEIGHBOURS, as_json, provenance_of
from tests.provenance.conftest import ANNEAL, NACL, SPUTTER, T0, H, M

pytestmark = pytest.mark.django_db


def test_each_dataset_resolves_to_the_preparation_before_it(history):
    p0, p1, p2, p3 = history.preparations
    expected = {
        "before-cleaning": (p0, [p0]),
        "clean": (p1, [p1]),
        "nacl": (p2, [p1, p2]),
        "nacl-2": (p2, [p1, p2]),
        "co": (p3, [p1, p2, p3]),
    }
    for name, (last, since_cleaning) in expected.items():
        found = provenance_of(history.files[name])
        assert found.preparation == last, name
        assert [p.pk for p in found.preparations] == [p.pk for p in since_cleaning], name
        assert found.stale == [], name
    # The cleaning is the anneal of preparation 1; the Ag of the day before is gone with it.
    clean = provenance_of(history.files["clean"])
    assert clean.cleaning_step.preparation_id == p1.pk and clean.cleaning_step.kind == "anneal"
    assert clean.surface.cleaned_at == T0 and clean.coverages == []


def test_surface_state_adds_up_the_doses_since_cleaning(history):
    before = provenance_of(history.files["before-cleaning"])
    # 0.1 ML/min × 5 min = 0.5 ML of Ag (nominal coverage = rate × time).
    assert [(c.material, c.coverage_ml) for c in before.coverages] == [("Ag", pytest.approx(0.5))]
    co = provenance_of(history.files["co"])
    assert [(c.material, c.coverage_ml) for c in co.coverages] == [("NaCl", pytest.approx(0.4))]
    # 1 L = 1e-6 Torr·s (IUPAC Gold Book, "langmuir"); 1e-6 mbar × 100 s = 7.5006e-5 Torr·s
    # = 75.006 L at the gauge (1 mbar = 0.750062 Torr, NIST SP 811). The surface state adds
    # up the gas-corrected exposure.
    step = co.preparations[-1].steps.all()[0]
    assert step.exposure_langmuir == pytest.approx(75.006, rel=1e-4)
    assert co.surface.exposures_langmuir["CO"] == pytest.approx(step.exposure_langmuir_corrected)
    body = as_json(co)
    steps = body["preparations"][0]["steps"]
    assert [(s["kind"], s["cleans"]) for s in steps] == [("sputter", False), ("anneal", True)]
    # The values as logged and the doses derived from them, in SI with the unit in the key.
    assert steps[0]["values"]["energy_ev"] == pytest.approx(1000.0)
    assert steps[0]["values"]["current_a"] == pytest.approx(1e-6)
    # Ion fluence = I·t / (e·A): 1 µA × 600 s / (1.602176634e-19 C × 1 cm²)
    # (e from CODATA 2018, exact in the SI).
    assert steps[0]["values"]["fluence_per_cm2"] == pytest.approx(
        1e-6 * 600 / 1.602176634e-19, rel=1e-6
    )
    assert [c["material"] for c in body["surface_state"]["coverages"]] == ["NaCl"]
    assert body["surface_state"]["cleaned_at"] == T0.isoformat()
    assert SPUTTER["kind"] == "sputter" and ANNEAL["cleans"] and NACL["material"] == "NaCl"


def test_tip_state_is_the_conditioning_since_mounting(history):
    fe, co_pickup = history.conditioning
    expected = {
        "clean": ([], None),
        "nacl": ([fe.pk], None),
        "co": ([fe.pk, co_pickup.pk], "CO"),
    }
    for name, (events, apex) in expected.items():
        found = provenance_of(history.files[name])
        assert found.tip == history.tip, name
        assert found.tip_state.mount == history.mount, name
        assert [e.pk for e in found.tip_state.events] == events, name
        assert found.tip_state.apex_species == apex, name
    # Before the tip went in there is no tip to trace.
    assert provenance_of(history.files["before-cleaning"]).tip is None


def test_instrument_state_is_the_nearest_reading_before_acquisition(history):
    expected = {
        "clean": (1.0e-10, 10 * 60),
        "nacl": (2.0e-10, 10 * 60),
        "co": (3.0e-10, 5 * 60),
    }
    for name, (value, age_s) in expected.items():
        state = provenance_of(history.files[name]).instrument_state
        (channel,) = state["channels"]
        assert channel["name"] == "STM pressure"
        assert channel["value"] == pytest.approx(value)
        assert channel["age_s"] == pytest.approx(age_s)
        assert channel["flags"] == []
    # A day before, no reading had been logged yet.
    (channel,) = provenance_of(history.files["before-cleaning"]).instrument_state["channels"]
    assert channel["value"] is None and channel["flags"] == ["no_reading"]


def test_operator_session_processing_and_checksum(history, member):
    found = provenance_of(history.files["nacl"])
    assert found.operator == member and found.session == history.session
    assert found.checksums == {"sha256": history.files["nacl"].sha256}
    assert found.processing["reader"].startswith("npy")
    assert "rq" in found.processing["statistics"]
    assert found.processing["parameters"]["scan_size_m"] == [pytest.approx(1e-8)] * 2


def test_neighbours_share_tip_state_surface_and_session(history):
    found = provenance_of(history.files["nacl"])
    tip_state = found.neighbours["tip_state"]
    surface = found.neighbours["surface_state"]
    session = found.neighbours["session"]
    # Only nacl-2 was taken after the same field emission and before the CO pick-up.
    assert [f.pk for f in tip_state.files] == [history.files["nacl-2"].pk]
    assert tip_state.count == 1
    # Only nacl-2 followed the same preparation.
    assert [f.pk for f in surface.files] == [history.files["nacl-2"].pk]
    # The session (08:00-15:00) holds every file of the day but this one.
    names = {"clean", "nacl-2", "co"}
    assert {f.pk for f in session.files} == {history.files[n].pk for n in names}
    assert session.count == 3


def test_a_step_logged_late_is_seen_and_the_stored_lineage_called_stale(history, member):
    from labbook.samples.actions import record_preparation

    late = record_preparation(
        sample=history.sample,
        instrument=history.instrument,
        started_at=T0 + 2 * H + 30 * M,
        steps=[NACL],
        actor=member,
    )
    found = provenance_of(history.files["nacl"])
    assert found.preparations[-1] == late
    assert found.coverages[0].coverage_ml == pytest.approx(0.8)
    assert found.stale == ["preparation", "coverage"]


def _count_queries(record) -> int:
    with CaptureQueriesContext(connection) as queries:
        provenance_of(record)
    return len(queries)


def test_the_query_count_does_not_grow_with_the_history(history, member, upload_file):
    from labbook.instruments.readings import insert_readings
    from labbook.logbook.actions import start_session
    from labbook.samples.actions import record_preparation
    from labbook.tips.actions import record_conditioning

    short = _count_queries(history.files["co"])
    assert short <= 16
    # Twenty more preparations, forty more conditionings and a thousand more readings.
    start = T0 + 6 * H
    for i in range(20):
        record_preparation(
            sample=history.sample,
            instrument=history.instrument,
            started_at=start + i * M,
            steps=[NACL, NACL],
            actor=member,
        )
    for i in range(40):
        record_conditioning(
            history.tip,
            kind="pulse",
            at=start + i * M + timedelta(seconds=30),
            params={"voltage_v": "3 V"},
            actor=member,
        )
    insert_readings(
        [(history.channel.pk, start + i * timedelta(seconds=5), 1e-10) for i in range(1000)]
    )
    start_session(history.instrument, start=start, end=start + 5 * H, actor=member)
    for i in range(NEIGHBOURS + 3):
        upload_file(f"late-{i}.npy", start + 45 * M + i * M, history.instrument, 100 + i)
    last = upload_file("last.npy", start + 2 * H, history.instrument, 999)
    found = provenance_of(last)
    assert len(found.preparations) == 23 and len(found.tip_state.events) == 42
    assert len(found.neighbours["tip_state"].files) == NEIGHBOURS
    assert found.neighbours["tip_state"].count == NEIGHBOURS + 3
    assert _count_queries(last) == short


def test_the_tip_state_read_here_is_the_tips_apps_own(history):
    from labbook.tips.queries import tip_state

    for name in ("clean", "nacl", "co"):
        record = history.files[name]
        ours = provenance_of(record).tip_state
        theirs = tip_state(history.tip, record.acquired_at)
        assert (ours.mount, ours.events, ours.apex_species) == (
            theirs.mount,
            theirs.events,
            theirs.apex_species,
        ), name


def test_the_surface_read_here_is_the_samples_apps_own(history):
    from labbook.samples.queries import surface_state

    for name, record in history.files.items():
        ours = provenance_of(record).surface
        theirs = surface_state(history.sample, record.acquired_at)
        assert ours.cleaned_at == theirs.cleaned_at, name
        assert ours.coverages == theirs.coverages, name
        assert ours.exposures_langmuir == theirs.exposures_langmuir, name
        assert [s.pk for s in ours.steps] == [s.pk for s in theirs.steps], name
