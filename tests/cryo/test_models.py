"""Migrations, calibrations, setup validation and helium recovery of the cryo app."""

from __future__ import annotations

from datetime import timedelta
from io import StringIO

import numpy as np
import pytest
from django.core.exceptions import ValidationError
from django.core.management import call_command

from labbook.cryo import actions, queries
from labbook.demo.instruments import insert_readings
from tests.cryo.conftest import NOW, at, synthetic_level

pytestmark = pytest.mark.django_db


def test_migrations_match_the_models():
    out = StringIO()
    call_command("makemigrations", "cryo", "--check", "--dry-run", stdout=out)
    assert "No changes detected" in out.getvalue()


def test_a_table_calibration_in_cm_gives_the_rate_in_litres(cryostat, manager):
    # A bath whose meter reads 0–50 cm, with a narrower neck above 40 cm: 0.2 L/cm below,
    # 0.1 L/cm above (interpolated, REFERENCES-free geometry invented for the test).
    table = {"kind": "table", "points": [[0, 0.0], [40, 8.0], [50, 9.0]]}
    actions.update_cryostat(cryostat, calibration=table, capacity_l=9.0, actor=manager)
    cryostat.refresh_from_db()
    t, pct, _ = synthetic_level(now=NOW, capacity_l=8.0, rate_l_per_day=2.0)
    # Keep to the linear part (below 40 cm): percent of 8 L → cm at 0.2 L/cm.
    cm = np.minimum(pct, 99) / 100 * 8.0 / 0.2
    insert_readings(cryostat.level_channel_id, t, cm)
    fc = queries.forecast_for(cryostat, NOW)
    assert fc.forecast.rate_l_per_day == pytest.approx(2.0, rel=0.02)
    assert float(queries.calibration_of(cryostat).to_litres(45.0)) == pytest.approx(8.5)


@pytest.mark.parametrize(
    ("calibration", "message"),
    [
        ({"kind": "table", "points": [[0, 0]]}, "at least two"),
        ({"kind": "table", "points": [[10, 0], [5, 3]]}, "increase strictly"),
        ({"kind": "spline"}, "unknown calibration kind"),
        ({"kind": "linear", "litres_at_zero": 5, "litres_at_full": 1}, "more than"),
    ],
)
def test_bad_calibrations_are_refused_with_the_reason(cryostat, manager, calibration, message):
    with pytest.raises(ValidationError, match=message):
        actions.update_cryostat(cryostat, calibration=calibration, actor=manager)


def test_setup_is_for_managers_and_checks_the_channel(instrument, level_channel, member, manager):
    from labbook.accounts.permissions import PermissionDenied

    with pytest.raises(PermissionDenied):
        actions.create_cryostat(
            instrument,
            level_channel=level_channel,
            cryogen="LN2",
            capacity_l=20,
            minimum_l=2,
            actor=member,
        )
    with pytest.raises(ValidationError, match="below the capacity"):
        actions.create_cryostat(
            instrument,
            level_channel=level_channel,
            cryogen="LN2",
            capacity_l=20,
            minimum_l=25,
            actor=manager,
        )


def test_logged_refills_merge_refill_rows_and_transfer_events(logged, member, manager):
    from labbook.instruments.actions import record_event

    start = NOW - timedelta(days=2)
    # A transfer logged on the instrument page (no Refill row), in % as the meter reads.
    record_event(
        logged.instrument,
        kind="cryogen_transfer",
        start=start,
        actor=member,
        details={"cryogen": "LHe", "taken_l": 10.0, "level_before_pct": 20, "level_after_pct": 95},
    )
    record_event(
        logged.instrument,
        kind="cryogen_transfer",
        start=start,
        actor=member,
        details={"cryogen": "LN2", "taken_l": 20.0},
    )
    refill = actions.record_refill(logged, at=start + timedelta(hours=1), taken_l=9, actor=member)
    found = queries.logged_refills(logged, start - timedelta(hours=1), NOW)
    assert [r.source for r in found] == ["event", "refill"]  # LN2 is another cryostat's
    event = found[0]
    # 20 % → 95 % of 12 L (linear default calibration) = 9.0 L into the bath.
    assert event.level_before_l == pytest.approx(2.4) and event.transferred_l == pytest.approx(9.0)
    assert found[1].pk == refill.pk  # its own event is not counted twice


def test_helium_recovery_as_liquid_equivalent(logged, flow_channel, member, manager):
    actions.update_cryostat(logged, actor=manager)
    logged.recovery_flow_channel = flow_channel
    logged.save()
    # 1 L/min of gas for a day is 1.44 m³; at 637 L of gas (15 °C) per litre of liquid lost
    # (REFERENCES.md §1, CoolProp: ρ_l − ρ_v) that is 2.26 L of liquid.
    t = np.arange(int(NOW.timestamp()) - 86400, int(NOW.timestamp()) + 1, 600, dtype=np.int64)
    insert_readings(flow_channel.pk, t, np.ones(t.shape))
    actions.record_refill(logged, at=NOW - timedelta(hours=5), taken_l=4.52, actor=member)
    found = queries.helium_recovery(logged, at(t[0]), at(t[-1]))
    assert found.gas_m3 == pytest.approx(1.44, rel=1e-6)
    assert found.recovered_liquid_l == pytest.approx(1440 / 637, rel=2e-3)
    assert found.fraction == pytest.approx(1440 / 637 / 4.52, rel=2e-3)


def test_planner_without_cryostats_says_so(client, member):
    client.force_login(member)
    page = client.get("/cryostats/")
    assert page.status_code == 200 and "No cryostats yet" in page.content.decode()


def test_phone_width_layout(client, member, logged):
    import re
    from pathlib import Path

    import labbook.cryo

    css = (Path(labbook.cryo.__file__).parent / "static/cryo/cryo.css").read_text()
    # Below 40 rem (a 390 px phone) the tables stack into rows labelled by data-label …
    assert "@media (max-width: 40rem)" in css and "attr(data-label)" in css
    client.force_login(member)
    text = client.get("/cryostats/").content.decode()
    cells = re.findall(r"<td[^>]*>", text)
    assert cells and all("data-label=" in cell for cell in cells)
    # … and the plot has a picture drawn for a phone's width (350 CSS px inside 390 px).
    narrow = re.search(r'<source media="\(max-width: 47.99rem\)"[^>]*width="(\d+)"', text)
    assert narrow and int(narrow.group(1)) <= 390 - 2 * 16


def test_analysis_finds_every_refill_and_no_false_one_from_spikes(cryostat):
    t, pct, refills = synthetic_level(now=NOW)
    # Single-sample read-out spikes of +30 % (a heater glitch) must not look like refills.
    spikes = [40, 170, 333, 501]
    pct[spikes] = np.minimum(pct[spikes] + 30.0, 100.0)
    insert_readings(cryostat.level_channel_id, t, pct)
    found = queries.analysis_for(cryostat, NOW).analysis.refills
    assert len(found) == len(refills)
    for refill, expected in zip(found, refills, strict=True):
        assert abs(refill.t_end - expected) <= 1800 + 1  # within one reading
    fc = queries.forecast_for(cryostat, NOW).forecast
    assert fc.rate_l_per_day == pytest.approx(3.0, rel=0.02)


def test_a_cryostat_that_cannot_be_planned_is_named_and_the_others_still_are(
    cryostat, instrument, manager, monkeypatch
):
    from labbook.science import cryogen as sc

    real = sc.plan_refills

    def refuse_ln2(inputs, **kwargs):
        if any(item.name == "LN2" for item in inputs):
            raise sc.ScienceInputError("LN2 input refused for the test", argument="inputs")
        return real(inputs, **kwargs)

    from labbook.instruments.actions import create_channel

    channel = create_channel(
        instrument, name="LN2 level", quantity="cryogen_level", unit="%", actor=manager
    )
    ln2 = actions.create_cryostat(
        instrument,
        level_channel=channel,
        cryogen="LN2",
        capacity_l=24,
        minimum_l=3,
        actor=manager,
    )
    t, pct, _ = synthetic_level(now=NOW, capacity_l=24, rate_l_per_day=5.0)
    insert_readings(channel.pk, t, pct)
    t, pct, _ = synthetic_level(now=NOW)
    insert_readings(cryostat.level_channel_id, t, pct)
    monkeypatch.setattr(sc, "plan_refills", refuse_ln2)
    plan = queries.lab_plan(NOW, 2)
    assert [(c.pk, reason) for c, reason in plan.skipped] == [
        (ln2.pk, "LN2 input refused for the test")
    ]
    assert plan.refills and {r.cryogen for r in plan.refills} == {"LHe"}
