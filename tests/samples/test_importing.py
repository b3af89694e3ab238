"""Importing past preparations from the old spreadsheet: a dry run that names every bad row and
saves nothing, an import that keeps the good preparations and computes their doses through the
same action as the API, and a re-import that adds nothing.

The fixture ``fixtures/preparations-old-logbook.csv`` is an invented page of the demo lab's old
sheet, written by hand (rows 2-9 and 18 are good; rows 10-17 each carry one fault the lab's
sheets really have), and ``fixtures/preparations-mapping.json`` is its column mapping.
"""

from __future__ import annotations

import io
from datetime import UTC, date, datetime
from io import StringIO
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from django.core.management import call_command
from django.core.management.base import CommandError

from labbook.instruments.actions import create_instrument
from labbook.samples import actions
from labbook.samples.importing import (
    REJECTED,
    ImportMapping,
    MappingError,
    apply_options,
    import_preparations,
    load_mapping,
    parse_local_time,
    read_mapping_file,
)
from labbook.samples.models import Preparation, PreparationStep, Sample

pytestmark = pytest.mark.django_db

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures"
CSV = FIXTURES / "preparations-old-logbook.csv"
MAPPING = FIXTURES / "preparations-mapping.json"
BERLIN = ZoneInfo("Europe/Berlin")

# (row, field) of every fault in the fixture, and the words its message must carry.
BAD_ROWS = {
    (10, "energy_ev"): "unknown unit 'kfoo'",
    (12, "current_a"): "cannot be converted to A",
    (13, "duration_s"): "must be more than 0 s, got -300",
    (15, "gas"): "'Hx'",
    (16, "sample"): "is required",
    (17, "started_at"): "cannot read '31.02.2023 10:00'",
}
# Rows of a rejected preparation that are fine themselves: rejected with their preparation.
CARRIED = {11: 10, 14: 13}


@pytest.fixture
def lab(manager, make_user):
    """LTM-1 with its C60 cell, the three people the sheet names, and the Cu crystal. The
    instrument's own zone is UTC so that the mapping's zone (Berlin) is what is tested."""
    ltm = create_instrument(name="LTM-1", description="", time_zone="UTC", actor=manager)
    people = {name: make_user(name) for name in ("amira", "jonas", "leo")}
    cell = actions.add_deposition_source(ltm, name="C60 K-cell", material="C60", actor=manager)
    calibration = actions.record_calibration(
        cell,
        points=[
            {"duration_s": 120, "coverage_ml": 0.11},
            {"duration_s": 240, "coverage_ml": 0.21},
            {"duration_s": 360, "coverage_ml": 0.32},
        ],
        measured_at=datetime(2023, 2, 20, 12, 0, tzinfo=UTC),
        actor=manager,
    )
    crystal = actions.create_sample(name="Cu(111) #2", substrate="Cu(111)", actor=manager)
    return {"ltm": ltm, "cell": cell, "calibration": calibration, "crystal": crystal, **people}


def _mapping(**options):
    return load_mapping(apply_options(read_mapping_file(MAPPING), **options))


def _counts() -> tuple[int, int, int, int]:
    return (
        Sample.objects.count(),
        Preparation.objects.count(),
        PreparationStep.objects.count(),
        Preparation.history.count() + PreparationStep.history.count() + Sample.history.count(),
    )


def test_dry_run_names_every_bad_row_and_field_and_saves_nothing(lab):
    before = _counts()
    report = import_preparations(
        CSV, _mapping(), actor=lab["amira"], commit=False, create_samples=True
    )
    assert _counts() == before  # not a preparation, a step, a new sample or a history row

    problems = {(p.row, p.field): p for p in report.problems}
    assert set(problems) == set(BAD_ROWS) | {(row, "") for row in CARRIED}
    for key, words in BAD_ROWS.items():
        assert words in problems[key].message, key
    assert problems[(10, "energy_ev")].column == "E (keV)"
    assert problems[(12, "current_a")].column == "I (uA)"
    for row, cause in CARRIED.items():
        assert f"row {cause} of the same preparation" in problems[(row, "")].message

    assert len(report.rejected) == 6
    assert [(o.sample, o.steps) for o in report.imported] == [
        ("Cu(111) #2", 3),
        ("Cu(111) #2", 3),
        ("Ag(100) #1", 2),
        ("Cu(111) #2", 1),
    ]
    assert report.per_sample() == {"Ag(100) #1": (1, 2), "Cu(111) #2": (3, 7)}
    text = report.render()
    assert "Dry run" in text and "would import 4 preparations, 9 steps" in text
    assert "new sample Ag(100) #1 (Ag(100))" in text
    assert "row 13: duration_s (column 't (min)'): must be more than 0 s" in text
    assert "not imported: 6 preparations (8 rows)" in text


def test_commit_imports_the_good_preparations_with_derived_values(lab):
    report = import_preparations(
        CSV, _mapping(), actor=lab["amira"], commit=True, create_samples=True
    )
    assert len(report.imported) == 4 and len(report.rejected) == 6
    assert Preparation.objects.count() == 4 and PreparationStep.objects.count() == 9

    first, second, third, fourth = Preparation.objects.order_by("started_at")
    sputter, anneal, deposit = first.steps.order_by("position")
    # 3 µA for 15 min on the 1 cm² constant: Φ = I·t/(e·A) (REFERENCES.md §4).
    assert sputter.fluence_per_cm2 == pytest.approx(3e-6 * 900 / 1.602176634e-19)
    assert sputter.energy_ev == 1000.0 and sputter.raw_input["energy_ev"] == "1 keV"
    assert sputter.current_a == pytest.approx(3e-6) and sputter.beam_area_cm2 == 1.0
    # The mapping's rule: the anneal after the sputter leaves the surface clean.
    assert anneal.cleans and anneal.temperature_k == 770.0 and not sputter.cleans
    assert deposit.coverage_ml == pytest.approx(1.0) and deposit.notes == "islands at RT"

    sputter, anneal, evap = second.steps.order_by("position")
    # REFERENCES.md §4: 1 µA for 10 min on 1 cm² = 3.745e15 ions/cm² (Φ = I·t/(e·A)).
    assert sputter.fluence_per_cm2 == pytest.approx(3.745e15, rel=1e-3)
    # IEC 60584-1 type K: 20.644 mV ↔ 500 °C, reference junction at 0 °C.
    assert anneal.temperature_source == "thermocouple"
    assert anneal.temperature_k == pytest.approx(773.15, abs=0.01)
    assert evap.source == lab["cell"] and evap.calibration == lab["calibration"]
    assert evap.coverage_ml == pytest.approx(3 * lab["calibration"].rate_ml_per_min)
    assert second.operator == lab["jonas"]

    assert third.sample.name == "Ag(100) #1" and third.sample.substrate == "Ag(100)"
    assert third.operator == lab["leo"] and third.steps.get(position=0).energy_ev == 800.0
    dose = fourth.steps.get()
    # REFERENCES.md §2: 1e-6 mbar × 100 s = 75.0 L, so 1e-8 mbar × 20 s ("20 s" overrides
    # the column's minutes) = 0.150 L; CO reads as N2 on the gauge (S = 1.0).
    assert dose.duration_s == 20.0
    assert dose.exposure_langmuir == pytest.approx(0.1500123, rel=1e-6)

    # The history names the person who imported; the operator is who did the work.
    assert {h.history_user for h in Preparation.history.all()} == {lab["amira"]}
    assert first.operator == lab["amira"]
    # The rejected preparations left nothing, not even a step of their good rows.
    assert not Preparation.objects.filter(started_at__date=date(2023, 7, 14)).exists()


def test_re_import_adds_nothing_and_reports_what_it_skipped(lab):
    import_preparations(CSV, _mapping(), actor=lab["amira"], commit=True, create_samples=True)
    before = _counts()
    again = import_preparations(
        CSV, _mapping(), actor=lab["jonas"], commit=True, create_samples=True
    )
    assert _counts() == before
    assert not again.imported and len(again.skipped) == 4 and len(again.rejected) == 6
    assert all("already in labbook" in o.reason for o in again.skipped)
    assert "skipped 4 preparations" in again.render()


def test_naive_times_are_read_in_the_mappings_zone_and_stored_as_utc(lab):
    import_preparations(CSV, _mapping(), actor=lab["amira"], commit=True, create_samples=True)
    starts = list(Preparation.objects.order_by("started_at").values_list("started_at", flat=True))
    # 10:15 in Berlin in March is CET (UTC+1), 14:30 in July is CEST (UTC+2).
    assert starts[0] == datetime(2023, 3, 6, 9, 15, tzinfo=UTC)
    assert starts[2] == datetime(2023, 7, 12, 12, 30, tzinfo=UTC)
    assert all(s.utcoffset().total_seconds() == 0 for s in starts)

    # The same sheet read as UTC times lands an hour later, and is a different preparation.
    report = import_preparations(
        CSV, _mapping(time_zone="UTC"), actor=lab["amira"], commit=False, create_samples=True
    )
    assert report.imported[0].started_at == datetime(2023, 3, 6, 10, 15, tzinfo=UTC)


def test_without_create_samples_an_unknown_sample_is_rejected(lab):
    report = import_preparations(CSV, _mapping(), actor=lab["amira"], commit=True)
    ag = [o for o in report.outcomes if o.sample == "Ag(100) #1"]
    assert {o.status for o in ag} == {REJECTED}
    messages = [p.message for o in ag for p in o.problems if p.field == "sample"]
    assert messages and all("--create-samples" in m for m in messages)
    assert not Sample.objects.filter(name="Ag(100) #1").exists()
    assert Preparation.objects.count() == 3


def test_dates_that_do_not_exist_or_happen_twice_are_refused():
    fmt = ["%d.%m.%Y %H:%M"]
    with pytest.raises(ValueError, match="does not exist"):
        parse_local_time("26.03.2023 02:30", fmt, BERLIN)
    with pytest.raises(ValueError, match="happens twice"):
        parse_local_time("29.10.2023 02:30", fmt, BERLIN)
    assert parse_local_time("2023-10-29 02:30 +01:00", fmt, BERLIN) == datetime(
        2023, 10, 29, 1, 30, tzinfo=UTC
    )
    assert parse_local_time("29.10.2023 03:30", fmt, BERLIN) == datetime(
        2023, 10, 29, 2, 30, tzinfo=UTC
    )


def test_a_bad_mapping_is_refused_with_every_problem():
    with pytest.raises(MappingError) as caught:
        load_mapping(
            {
                "columns": [
                    {"column": "Crystal", "field": "sample"},
                    {"column": "I", "field": "current_a", "unit": "mbar"},
                    {"column": "E", "field": "energy_ev", "unit": "furlongs"},
                    {"column": "X", "field": "colour"},
                ],
                "time_zone": "Mars/Olympus",
                "kinds": {"zap": "laser"},
            }
        )
    text = "\n".join(caught.value.problems)
    for words in (
        "unit 'mbar' does not fit current_a",
        "unit 'furlongs' does not fit energy_ev",
        "unknown field 'colour'",
        "Mars/Olympus",
        "'laser', which is not a step kind",
        "nothing feeds instrument",
        "nothing feeds started_at",
        "nothing feeds kind",
    ):
        assert words in text, words


def test_a_column_missing_from_the_header_stops_the_import_before_anything(lab):
    mapping = _mapping(maps=["current_a=Ion current"])
    with pytest.raises(MappingError, match="'Ion current' is not in the header"):
        import_preparations(CSV, mapping, actor=lab["amira"], commit=True)
    assert not Preparation.objects.exists()


def test_one_row_per_preparation_with_decimal_commas(lab):
    sheet = io.StringIO(
        "Datum;Probe;Sp E (eV);Sp I (uA);Sp t (min);Ann T (degC);Ann t (min)\n"
        "2023-05-02 09:00;Cu(111) #2;1000;2,5;15;500;10\n"
        "2023-05-03 09:00;Cu(111) #2;;;;480;5\n"
    )
    mapping = load_mapping(
        {
            "layout": "row_per_preparation",
            "delimiter": ";",
            "decimal": ",",
            "time_zone": "Europe/Berlin",
            "cleaning": "last_anneal_after_sputter",
            "columns": [
                {"column": "Datum", "field": "started_at"},
                {"column": "Probe", "field": "sample"},
            ],
            "constants": {"instrument": "LTM-1", "beam_area_cm2": 1},
            "steps": [
                {
                    "kind": "sputter",
                    "columns": [
                        {"column": "Sp E (eV)", "field": "energy_ev", "unit": "eV"},
                        {"column": "Sp I (uA)", "field": "current_a", "unit": "uA"},
                        {"column": "Sp t (min)", "field": "duration_s", "unit": "min"},
                    ],
                },
                {
                    "kind": "anneal",
                    "columns": [
                        {"column": "Ann T (degC)", "field": "temperature_k", "unit": "degC"},
                        {"column": "Ann t (min)", "field": "duration_s", "unit": "min"},
                    ],
                },
            ],
        }
    )
    report = import_preparations(sheet, mapping, actor=lab["amira"], commit=True)
    assert [o.steps for o in report.imported] == [2, 1] and not report.rejected
    first, second = Preparation.objects.order_by("started_at")
    sputter, anneal = first.steps.order_by("position")
    assert sputter.current_a == pytest.approx(2.5e-6)  # "2,5" read with a decimal comma
    assert anneal.temperature_k == pytest.approx(773.15) and anneal.cleans
    # The second day was an anneal only: no sputter step, and no cleaning claimed.
    only = second.steps.get()
    assert (only.kind, only.temperature_k, only.cleans) == ("anneal", pytest.approx(753.15), False)


def _pressure_beside_an_anneal(extra_values: str) -> tuple[io.StringIO, ImportMapping]:
    return io.StringIO(
        "date,sample,step,T (K),t (min),p (mbar)\n2023-05-04 11:00,Cu(111) #2,ann,780,10,3e-9\n"
    ), load_mapping(
        {
            "extra_values": extra_values,
            "columns": [
                {"column": "date", "field": "started_at"},
                {"column": "sample", "field": "sample"},
                {"column": "step", "field": "kind"},
                {"column": "T (K)", "field": "temperature_k", "unit": "K"},
                {"column": "t (min)", "field": "duration_s", "unit": "min"},
                {"column": "p (mbar)", "field": "pressure_mbar", "unit": "mbar"},
            ],
            "constants": {"instrument": "LTM-1"},
        }
    )


def test_a_value_the_step_kind_has_no_field_for_is_rejected_or_kept_in_the_notes(lab):
    sheet, mapping = _pressure_beside_an_anneal("reject")
    report = import_preparations(sheet, mapping, actor=lab["amira"], commit=True)
    (problem,) = report.problems
    assert (problem.row, problem.field, problem.column) == (2, "pressure_mbar", "p (mbar)")
    assert "is not a field of an anneal step" in problem.message
    assert not Preparation.objects.exists()

    sheet, mapping = _pressure_beside_an_anneal("notes")
    report = import_preparations(sheet, mapping, actor=lab["amira"], commit=True)
    assert not report.rejected
    # Nothing the sheet said is lost: the pressure stays beside the anneal, word for word.
    assert PreparationStep.objects.get().notes == "p (mbar): 3e-9"


def test_the_command_is_a_dry_run_unless_told_to_commit(lab):
    args = [str(CSV), "--mapping", str(MAPPING), "--user", "amira", "--create-samples"]
    out = StringIO()
    call_command("import_preparations", *args, stdout=out)
    assert "Dry run" in out.getvalue() and "row 17: started_at" in out.getvalue()
    assert not Preparation.objects.exists()

    out = StringIO()
    call_command("import_preparations", *args, "--commit", stdout=out)
    assert "imported 4 preparations, 9 steps" in out.getvalue()
    assert Preparation.objects.count() == 4

    out = StringIO()
    call_command("import_preparations", *args, "--commit", stdout=out)
    assert "imported 0 preparations" in out.getvalue() and Preparation.objects.count() == 4


def test_the_command_takes_the_mapping_from_options(lab, tmp_path):
    sheet = tmp_path / "sheet.csv"
    sheet.write_text(
        "when,what,kV,uA,min,crystal\n2023-06-01T10:00:00+02:00,sp,1.5,2,20,Cu(111) #2\n"
    )
    call_command(
        "import_preparations",
        str(sheet),
        "--user",
        "jonas",
        "--commit",
        "--map",
        "started_at=when",
        "--map",
        "kind=what",
        "--map",
        "energy_ev=kV",
        "--unit",
        "energy_ev=kV",
        "--map",
        "current_a=uA",
        "--unit",
        "current_a=uA",
        "--map",
        "duration_s=min",
        "--unit",
        "duration_s=min",
        "--map",
        "sample=crystal",
        "--set",
        "instrument=LTM-1",
        "--set",
        "beam_area_cm2=0.5 cm^2",
        stdout=StringIO(),
    )
    step = PreparationStep.objects.get()
    # 1.5 kV accelerates a singly charged Ar ion to 1.5 keV (labbook.science.units).
    assert step.energy_ev == 1500.0 and step.beam_area_cm2 == 0.5
    assert step.preparation.started_at == datetime(2023, 6, 1, 8, 0, tzinfo=UTC)
    assert step.preparation.operator == lab["jonas"]
    with pytest.raises(CommandError, match="nothing feeds kind"):
        call_command("import_preparations", str(CSV), "--user", "jonas", "--map", "sample=Crystal")


def test_outsiders_cannot_import(lab, outsider):
    from labbook.accounts.permissions import PermissionDenied

    with pytest.raises(PermissionDenied):
        import_preparations(CSV, _mapping(), actor=outsider, commit=True)
    assert not Preparation.objects.exists()
