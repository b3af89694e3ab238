"""Every state change of cryostats, refills, the lab calendar and cryogen alerts: the one path
views, API, tasks and commands call.

Decisions:

* **A logged refill is also an instrument event.** ``record_refill`` writes the ``Refill`` and
  a cryogen-transfer event on the instrument's timeline (linked one to one), so the instrument
  state flags data taken during and just after the transfer, as for a transfer logged on the
  instrument page. Transfer events without a ``Refill`` (older logs, the demo) are merged in
  by ``queries.logged_refills``.
* **Alerts stay open until a person acknowledges them.** A condition that clears sets
  ``cleared_at`` but does not close the alert: a blocked vent at 3 a.m. must still be seen at
  9. Managers are emailed once, when an alert opens.
"""

from __future__ import annotations

import logging
from datetime import datetime, time, timedelta
from typing import Any

import numpy as np
from django.conf import settings
from django.contrib.auth import get_user_model
from django.core.exceptions import ValidationError
from django.core.mail import send_mail
from django.db import IntegrityError, transaction
from django.utils import timezone

from labbook.accounts.permissions import MANAGERS, require_manager, require_member
from labbook.core.records import save_record
from labbook.cryo import queries
from labbook.cryo.models import Alert, Cryostat, Holiday, LabCalendar, Refill
from labbook.instruments.actions import record_event
from labbook.instruments.models import Channel, Instrument, InstrumentEvent
from labbook.instruments.queries import DEFAULT_STALE_AFTER, STALE_FACTOR
from labbook.science import cryogen as sc
from labbook.science.errors import ScienceInputError

log = logging.getLogger(__name__)

# --- setup ------------------------------------------------------------------------------------

CRYOSTAT_FIELDS = (
    "name",
    "cryogen",
    "capacity_l",
    "minimum_l",
    "fill_to_l",
    "calibration",
    "transfer_loss_fraction",
    "line_cooldown_l",
    "price_per_l",
    "currency",
    "lead_time_working_days",
    "room_volume_m3",
    "transfer_dewar_l",
)


def _channel_of(instrument: Instrument, channel: Channel | None, field: str) -> Channel | None:
    if channel is not None and channel.instrument_id != instrument.pk:
        raise ValidationError({field: f"channel {channel} belongs to another instrument"})
    return channel


@transaction.atomic
def create_cryostat(
    instrument: Instrument,
    *,
    level_channel: Channel,
    recovery_flow_channel: Channel | None = None,
    oxygen_channel: Channel | None = None,
    actor,
    **values: Any,
) -> Cryostat:
    """A cryogen bath of ``instrument`` read on ``level_channel`` (lab-wide setup: managers)."""
    require_manager(actor)
    unknown = set(values) - set(CRYOSTAT_FIELDS)
    if unknown:
        raise ValidationError({name: "not a cryostat field" for name in sorted(unknown)})
    if not values.get("name"):
        values["name"] = f"{values.get('cryogen', '')} bath".strip()
    cryostat = Cryostat(
        instrument=instrument,
        level_channel=_channel_of(instrument, level_channel, "level_channel"),
        recovery_flow_channel=_channel_of(
            instrument, recovery_flow_channel, "recovery_flow_channel"
        ),
        oxygen_channel=oxygen_channel,
        **{k: v for k, v in values.items() if v is not None or k in ("fill_to_l",)},
    )
    if level_channel.quantity != Channel.Quantity.CRYOGEN_LEVEL:
        raise ValidationError({"level_channel": f"{level_channel} is not a cryogen level"})
    return save_record(cryostat, actor)


@transaction.atomic
def update_cryostat(cryostat: Cryostat, *, actor, **values: Any) -> Cryostat:
    require_manager(actor)
    cryostat = Cryostat.objects.select_for_update().get(pk=cryostat.pk)
    for name, value in values.items():
        if name not in CRYOSTAT_FIELDS:
            raise ValidationError({name: "not a cryostat field"})
        setattr(cryostat, name, value)
    return save_record(cryostat, actor)


@transaction.atomic
def configure_calendar(
    *,
    time_zone: str | None = None,
    working_days: list[int] | None = None,
    day_start: time | None = None,
    day_end: time | None = None,
    name: str = "lab",
    actor,
) -> LabCalendar:
    """Create or change the lab's calendar (managers)."""
    require_manager(actor)
    calendar = LabCalendar.objects.select_for_update().filter(name=name).first()
    calendar = calendar or LabCalendar(name=name)
    for attr, value in (
        ("time_zone", time_zone),
        ("working_days", working_days),
        ("day_start", day_start),
        ("day_end", day_end),
    ):
        if value is not None:
            setattr(calendar, attr, value)
    return save_record(calendar, actor)


@transaction.atomic
def add_holiday(calendar: LabCalendar, *, day, name: str = "", actor) -> Holiday:
    require_manager(actor)
    existing = Holiday.objects.filter(calendar=calendar, day=day).first()
    if existing is not None:
        raise ValidationError({"day": f"{day:%Y-%m-%d} is already a holiday ({existing.name})"})
    return save_record(Holiday(calendar=calendar, day=day, name=name), actor)


# --- refills ----------------------------------------------------------------------------------


@transaction.atomic
def record_refill(
    cryostat: Cryostat,
    *,
    at: datetime,
    end: datetime | None = None,
    transferred_l: float | None = None,
    taken_l: float | None = None,
    level_before_l: float | None = None,
    level_after_l: float | None = None,
    supply_dewar: str = "",
    notes: str = "",
    person=None,
    actor,
) -> Refill:
    """Log a transfer into ``cryostat`` (and the same transfer on the instrument's timeline).
    ``transferred_l`` defaults to after − before when both levels are given; the loss is
    taken − transferred when both are known."""
    require_member(actor)
    if transferred_l is None and level_before_l is not None and level_after_l is not None:
        transferred_l = max(level_after_l - level_before_l, 0.0)
    losses = None
    if taken_l is not None and transferred_l is not None:
        if transferred_l > taken_l:
            raise ValidationError(
                {"transferred_l": "more cannot reach the bath than left the supply dewar"}
            )
        losses = taken_l - transferred_l
    for name, value in (("level_before_l", level_before_l), ("level_after_l", level_after_l)):
        if value is not None and not 0 <= value <= cryostat.capacity_l * 1.05:
            raise ValidationError(
                {name: f"{value:g} L is outside 0 to the capacity ({cryostat.capacity_l:g} L)"}
            )
    person = person or (actor if getattr(actor, "is_authenticated", False) else None)
    details: dict[str, Any] = {"cryogen": cryostat.cryogen, "cryostat": cryostat.pk}
    if taken_l is not None:
        details["taken_l"] = taken_l
    if transferred_l is not None:
        details["transferred_l"] = transferred_l
    summary = f"{cryostat.cryogen} refill of {cryostat.name}"
    if transferred_l is not None:
        summary += f": {transferred_l:.1f} L into the bath"
    if taken_l is not None:
        summary += f", {taken_l:.1f} L from the supply dewar"
    event = record_event(
        cryostat.instrument,
        kind=InstrumentEvent.Kind.CRYOGEN_TRANSFER,
        start=at,
        end=end,
        summary=summary[:200],
        details=details,
        actor=actor,
    )
    refill = Refill(
        cryostat=cryostat,
        at=at,
        end=end,
        transferred_l=transferred_l,
        taken_l=taken_l,
        losses_l=losses,
        level_before_l=level_before_l,
        level_after_l=level_after_l,
        supply_dewar=supply_dewar,
        notes=notes,
        person=person,
        event=event,
    )
    return save_record(refill, actor)


# --- alerts -----------------------------------------------------------------------------------

#: "Zero" recovery flow: below this fraction of the gas the fitted boil-off makes.
ZERO_FLOW_FRACTION = 0.1
#: The recovery flow is judged over this stretch of recent readings.
FLOW_WINDOW = timedelta(minutes=30)
#: The bath "boils" while it holds more than this fraction of its capacity.
BOILING_FRACTION = 0.02
#: Helium gas per litre of liquid boiled off, litres at 15 °C (REFERENCES.md §1: 637, the
#: vapour left behind fills the vacated volume); nitrogen 676.
GAS_L_PER_LIQUID_L = {"LHe": 637.0, "LN2": 676.0}


def _stale_after(channel: Channel) -> timedelta:
    if channel.expected_interval_s:
        return timedelta(seconds=STALE_FACTOR * channel.expected_interval_s)
    return DEFAULT_STALE_AFTER


def _latest(channel_id: int, now: datetime, window: timedelta):
    t, v = queries.channel_arrays(channel_id, now - window, now)
    return t, v


def alert_conditions(cryostat: Cryostat, now: datetime) -> dict[str, tuple[str, dict]]:
    """The alert conditions that hold for ``cryostat`` at ``now``: {kind: (message, details)}.
    Pure reading: nothing is written."""
    found: dict[str, tuple[str, dict]] = {}
    channel = cryostat.level_channel
    stale_after = _stale_after(channel)
    t, _ = _latest(channel.pk, now, queries.ANALYSIS_WINDOW)
    if t.size == 0 or now.timestamp() - t[-1] > stale_after.total_seconds():
        age = (
            "none in the last 28 days"
            if t.size == 0
            else (f"the last is {(now.timestamp() - t[-1]) / 3600:.1f} h old")
        )
        found[Alert.Kind.STALE_LEVEL] = (
            f"{cryostat}: no new level reading on {channel.name!r} ({age}); "
            "check the level meter and its logger",
            {
                "stale_after_s": stale_after.total_seconds(),
                "last_reading_s": None if t.size == 0 else float(t[-1]),
            },
        )
    forecast = None
    try:
        forecast = queries.forecast_for(cryostat, now)
    except (queries.CryoDataError, ScienceInputError) as exc:
        log.info("no forecast for %s: %s", cryostat, exc)
    if forecast is not None:
        f = forecast.forecast
        rates = forecast.analysis.rates
        if rates.size >= 2 and sc.rate_rise_alert(rates):
            trailing = float(np.median(rates[-6:-1])) if rates.size > 1 else float("nan")
            found[Alert.Kind.RATE_RISE] = (
                f"{cryostat}: boil-off {rates[-1]:.2f} L/day, more than 30 % above the trailing "
                f"median of {trailing:.2f} L/day; a degraded isolation vacuum looks like this "
                "(re-pump it if it stays up)",
                {"rate_l_per_day": float(rates[-1]), "trailing_median_l_per_day": trailing},
            )
        calendar = queries.science_calendar()
        next_slot = calendar.next_working_slot(now)
        soonest = f.minimum_at_earliest or f.minimum_at
        if soonest is not None and soonest <= next_slot:
            found[Alert.Kind.MINIMUM_BEFORE_SLOT] = (
                f"{cryostat}: the level may reach its minimum ({cryostat.minimum_l:g} L) by "
                f"{soonest:%Y-%m-%d %H:%M} UTC, before the next working slot "
                f"({next_slot:%Y-%m-%d %H:%M} UTC); arrange a refill now",
                {"minimum_at": soonest.isoformat(), "next_slot": next_slot.isoformat()},
            )
        boiling = f.level_now_l > BOILING_FRACTION * cryostat.capacity_l and f.rate_l_per_day > 0
        if cryostat.recovery_flow_channel_id and boiling:
            ft, flow = _latest(cryostat.recovery_flow_channel_id, now, FLOW_WINDOW)
            expected = f.rate_l_per_day * GAS_L_PER_LIQUID_L[cryostat.cryogen] / 1440.0
            if flow.size and float(flow.max()) < ZERO_FLOW_FRACTION * expected:
                found[Alert.Kind.RECOVERY_FLOW_ZERO] = (
                    f"{cryostat}: the gas flow to the recovery line is {flow.max():.2f} L/min "
                    f"while the bath boils off ~{expected:.1f} L/min of gas: the vent may be "
                    "blocked or iced. Pressure builds up in a closed cryostat; check the "
                    "relief valves and the neck now",
                    {"flow_l_per_min": float(flow.max()), "expected_l_per_min": expected},
                )
    if cryostat.oxygen_channel_id:
        ot, oxygen = _latest(cryostat.oxygen_channel_id, now, _stale_after(cryostat.oxygen_channel))
        if oxygen.size and float(oxygen[-1]) < sc.OXYGEN_DEFICIENT_PERCENT:
            found[Alert.Kind.OXYGEN_LOW] = (
                f"{cryostat}: the room oxygen monitor reads {oxygen[-1]:.1f} % O₂, below "
                f"{sc.OXYGEN_DEFICIENT_PERCENT} % (oxygen-deficient, OSHA 29 CFR 1910.134). "
                "Leave the room and ventilate it; do not go back in alone",
                {"oxygen_percent": float(oxygen[-1])},
            )
    return found


def _managers_emails() -> list[str]:
    users = get_user_model().objects.filter(is_active=True).filter(groups__name=MANAGERS)
    return sorted({u.email for u in users if u.email})


def _email(alert: Alert) -> None:
    to = _managers_emails()
    if not to:
        return
    subject = f"[labbook] {alert.cryostat}: {alert.get_kind_display()}"
    body = (
        f"{alert.message}\n\nOpened {alert.opened_at:%Y-%m-%d %H:%M} UTC. "
        "Acknowledge it on the cryostat planner page once someone is on it.\n\n"
        "labbook plans; people transfer. Follow the local safety rules for cryogens."
    )
    send_mail(subject, body, settings.DEFAULT_FROM_EMAIL, to)
    alert.emailed_at = timezone.now()
    alert.save(update_fields=["emailed_at"])


def check_alerts(
    cryostat: Cryostat, now: datetime | None = None, *, notify: bool = True
) -> list[Alert]:
    """Open an alert for every condition that holds and has none open, note the ones still
    seen, mark cleared the ones whose condition is gone. Returns the alerts opened now.
    Idempotent: a second run at the same instant opens nothing."""
    now = now or timezone.now()
    conditions = alert_conditions(cryostat, now)
    opened: list[Alert] = []
    with transaction.atomic():
        Cryostat.objects.select_for_update().filter(pk=cryostat.pk).first()
        current = {
            a.kind: a for a in Alert.objects.filter(cryostat=cryostat, state=Alert.State.OPEN)
        }
        for kind, (message, details) in conditions.items():
            alert = current.get(kind)
            if alert is not None:
                alert.last_seen_at, alert.cleared_at, alert.details = now, None, details
                alert.save(update_fields=["last_seen_at", "cleared_at", "details", "updated_at"])
                continue
            alert = Alert(
                cryostat=cryostat,
                kind=kind,
                message=message,
                details=details,
                opened_at=now,
                last_seen_at=now,
            )
            try:
                with transaction.atomic():
                    save_record(alert, None)
            except IntegrityError:  # opened by a concurrent run
                continue
            opened.append(alert)
        for kind, alert in current.items():
            if kind not in conditions and alert.cleared_at is None:
                alert.cleared_at = now
                alert.save(update_fields=["cleared_at", "updated_at"])
    # After the rows are committed: a mail about an alert that was rolled back would confuse.
    for alert in opened if notify else ():
        _email(alert)
    return opened


@transaction.atomic
def acknowledge_alert(alert: Alert, *, actor, at: datetime | None = None) -> Alert:
    require_member(actor)
    alert = Alert.objects.select_for_update().get(pk=alert.pk)
    if alert.state == Alert.State.ACKNOWLEDGED:
        raise ValidationError({"state": "this alert has already been acknowledged"})
    alert.state = Alert.State.ACKNOWLEDGED
    alert.acknowledged_at = at or timezone.now()
    alert.acknowledged_by = actor if getattr(actor, "is_authenticated", False) else None
    return save_record(alert, actor)
