"""The demo lab's cryostats: the LHe bath and LN2 shield of LTM-1 on their level channels, the
lab calendar with its one cryogen holiday, and the alert the week of raised boil-off gave.

Prices, the room and the dewar are invented for the demo. Fill levels and losses follow the
story in :mod:`labbook.demo.readings` (95 % fills, 10–30 % helium transfer losses).
"""

from __future__ import annotations

from datetime import datetime, time, timedelta
from zoneinfo import ZoneInfo

from labbook.cryo import actions
from labbook.cryo.models import Alert, Cryostat, Holiday, LabCalendar
from labbook.demo import DemoContext
from labbook.demo.readings import cryo_holiday, raised_boiloff_week

CALENDAR_NAME = "lab"
HOLIDAY_NAME = "institute day (invented)"

#: name → (cryogen, level channel, settings). Capacities as in labbook.demo.readings.Scenario.
CRYOSTATS: dict[str, tuple[str, str, dict]] = {
    "LHe bath": (
        "LHe",
        "LHe bath level",
        {
            "capacity_l": 12.0,
            "minimum_l": 1.0,  # ~8 %: keep the scan head well covered (common practice)
            "fill_to_l": 11.4,  # the story's 95 % fills
            "transfer_loss_fraction": 0.2,  # common practice, 10–30 %
            "line_cooldown_l": 1.0,
            "price_per_l": 14.0,
            "lead_time_working_days": 5,
            "room_volume_m3": 120.0,
            "transfer_dewar_l": 100.0,
        },
    ),
    "LN2 shield": (
        "LN2",
        "LN2 shield level",
        {
            "capacity_l": 24.0,
            "minimum_l": 3.0,
            "fill_to_l": 22.8,
            "transfer_loss_fraction": 0.15,
            "line_cooldown_l": 0.5,
            "price_per_l": 0.6,
            "lead_time_working_days": 2,
            "room_volume_m3": 120.0,
            "transfer_dewar_l": 50.0,
        },
    ),
}


def _calendar(ctx: DemoContext, zone: str, holiday) -> tuple[LabCalendar, int]:
    calendar = LabCalendar.objects.filter(name=CALENDAR_NAME).first()
    new = 0
    if calendar is None:
        calendar = actions.configure_calendar(
            name=CALENDAR_NAME,
            time_zone=zone,
            working_days=[0, 1, 2, 3, 4],
            day_start=time(8, 0),
            day_end=time(17, 0),
            actor=ctx.manager,
        )
        new += 1
    if not Holiday.objects.filter(calendar=calendar, day=holiday).exists():
        actions.add_holiday(calendar, day=holiday, name=HOLIDAY_NAME, actor=ctx.manager)
        new += 1
    return calendar, new


def _past_rate_alert(ctx: DemoContext, cryostat: Cryostat, zone: ZoneInfo, monday) -> int:
    """The rate-rise alert of the week with the degraded vacuum, seen on the Wednesday at
    08:00 and acknowledged by the manager at 08:40, who had the vacuum re-pumped on Friday."""
    seen = datetime(monday.year, monday.month, monday.day, 8, 0, tzinfo=zone) + timedelta(days=2)
    if not ctx.start + timedelta(days=28) <= seen <= ctx.now:
        return 0
    if Alert.objects.filter(cryostat=cryostat, kind=Alert.Kind.RATE_RISE, opened_at=seen).exists():
        return 0
    opened = [
        a
        for a in actions.check_alerts(cryostat, seen, notify=False)
        if a.kind == Alert.Kind.RATE_RISE
    ]
    for alert in Alert.objects.filter(cryostat=cryostat, state=Alert.State.OPEN, opened_at=seen):
        actions.acknowledge_alert(alert, actor=ctx.manager, at=seen + timedelta(minutes=40))
    return len(opened)


def load_cryostats(ctx: DemoContext) -> dict[str, int]:
    if ctx.scenario is None:
        from labbook.demo.load import scenario_for

        ctx.scenario = scenario_for(ctx.instrument, ctx.now)
    instrument = ctx.instrument
    zone = instrument.time_zone
    _, new = _calendar(ctx, zone, cryo_holiday(ctx.scenario))
    found: dict[str, Cryostat] = {}
    for name, (cryogen, channel_name, values) in CRYOSTATS.items():
        cryostat = Cryostat.objects.filter(instrument=instrument, name=name).first()
        if cryostat is None:
            channels = ctx.channels
            cryostat = actions.create_cryostat(
                instrument,
                level_channel=channels[channel_name],
                recovery_flow_channel=channels["He recovery flow"] if cryogen == "LHe" else None,
                name=name,
                cryogen=cryogen,
                actor=ctx.manager,
                **values,
            )
            new += 1
        found[name] = cryostat
    monday, _ = raised_boiloff_week(ctx.scenario)
    _past_rate_alert(ctx, found["LHe bath"], ZoneInfo(zone), monday)
    # What the periodic check would say now (no email from the demo).
    for cryostat in found.values():
        actions.check_alerts(cryostat, ctx.now, notify=False)
    alerts = Alert.objects.filter(cryostat__in=found.values()).count()
    ctx.report(
        f"cryostats: {len(found)} on {instrument.name}, calendar in {zone} with "
        f"{Holiday.objects.count()} holiday(s), {alerts} alert(s) ({new} records new)"
    )
    return {
        "cryostats": len(found),
        "holidays": Holiday.objects.count(),
        "cryo_alerts": alerts,
    }
