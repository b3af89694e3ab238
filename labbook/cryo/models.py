"""Tables of cryostats, refills, the lab calendar refills are planned in, and cryogen alerts.

Forecasts and plans are not stored: they are computed from the readings each time
(``labbook.cryo.queries`` calling ``labbook.science.cryogen``), so a corrected reading or a
late-logged refill changes them at once.
"""

from __future__ import annotations

from datetime import time

from django.conf import settings
from django.core.exceptions import ValidationError
from django.core.validators import MaxValueValidator, MinValueValidator
from django.db import models
from django.db.models import Q

from labbook.core.models import LabRecord
from labbook.instruments.models import Channel, Instrument, InstrumentEvent, validate_time_zone


class Cryogen(models.TextChoices):
    LHE = "LHe", "liquid helium (LHe)"
    LN2 = "LN2", "liquid nitrogen (LN₂)"


#: Transfer losses when nothing is configured: a fraction of the liquid drawn from the supply
#: dewar lost to the siphon and flash gas, plus a fixed volume to cool the line. Common
#: practice (FIELD.md §3: top-ups lose 10–30 % of LHe); nitrogen loses less.
DEFAULT_LOSS_FRACTION = {Cryogen.LHE: 0.2, Cryogen.LN2: 0.1}
DEFAULT_LINE_COOLDOWN_L = {Cryogen.LHE: 1.0, Cryogen.LN2: 0.5}
#: Order helium at least five working days ahead (FIELD.md §3, common practice).
DEFAULT_LEAD_TIME_WORKING_DAYS = 5


def _lab_zone() -> str:
    return settings.TIME_ZONE


def _working_week() -> list[int]:
    return [0, 1, 2, 3, 4]


def validate_working_days(value) -> None:
    if not isinstance(value, list) or not value:
        raise ValidationError("give the working days as a list of weekday numbers, Monday = 0")
    bad = [d for d in value if isinstance(d, bool) or not isinstance(d, int) or not 0 <= d <= 6]
    if bad:
        raise ValidationError(f"weekdays are 0 (Monday) to 6 (Sunday), not {bad}")


def validate_calibration(value) -> None:
    """``None`` (linear from 0 L at 0 to the capacity at 100), ``{"kind": "linear",
    "litres_at_zero", "litres_at_full", "full_reading"}`` or ``{"kind": "table", "points":
    [[reading, litres], …]}`` with at least two points, readings strictly increasing."""
    if value in (None, {}):
        return
    if not isinstance(value, dict):
        raise ValidationError("the calibration is an object with a kind: linear or table")
    kind = value.get("kind")
    if kind == "linear":
        for key in ("litres_at_zero", "litres_at_full"):
            if not isinstance(value.get(key), int | float) or isinstance(value.get(key), bool):
                raise ValidationError(f"a linear calibration needs {key} (a number of litres)")
        full = value.get("full_reading", 100.0)
        if not isinstance(full, int | float) or full <= 0:
            raise ValidationError("full_reading must be a positive number (e.g. 100 for %)")
        if value["litres_at_full"] <= value["litres_at_zero"]:
            raise ValidationError("litres_at_full must be more than litres_at_zero")
    elif kind == "table":
        points = value.get("points")
        if not isinstance(points, list) or len(points) < 2:
            raise ValidationError("a table calibration needs at least two [reading, litres] points")
        for i, point in enumerate(points):
            if (
                not isinstance(point, list | tuple)
                or len(point) != 2
                or not all(isinstance(x, int | float) and not isinstance(x, bool) for x in point)
            ):
                raise ValidationError(f"point {i} must be [reading, litres], got {point!r}")
        readings = [p[0] for p in points]
        if any(b <= a for a, b in zip(readings, readings[1:], strict=False)):
            raise ValidationError("the table's readings must increase strictly")
    else:
        raise ValidationError(f"unknown calibration kind {kind!r}: use linear or table")


class LabCalendar(LabRecord):
    """When people are in the lab to transfer cryogens: the working days and hours of the lab,
    in its time zone, and its holidays. Refills are planned only inside working slots."""

    name = models.CharField(max_length=100, unique=True, default="lab")
    time_zone = models.CharField(max_length=64, default=_lab_zone, validators=[validate_time_zone])
    working_days = models.JSONField(
        default=_working_week,
        validators=[validate_working_days],
        help_text="weekday numbers, Monday = 0",
    )
    day_start = models.TimeField(default=time(8, 0))
    day_end = models.TimeField(default=time(17, 0))

    class Meta:
        ordering = ["name"]

    def clean(self) -> None:
        if (
            self.day_end is not None
            and self.day_start is not None
            and self.day_end <= self.day_start
        ):
            raise ValidationError({"day_end": "the working day ends after it starts"})

    def __str__(self) -> str:
        return f"{self.name} ({self.time_zone})"


class Holiday(LabRecord):
    """A day the lab is closed: nobody transfers cryogens, so the plan must bridge it."""

    calendar = models.ForeignKey(LabCalendar, on_delete=models.PROTECT, related_name="holidays")
    day = models.DateField()
    name = models.CharField(max_length=100, blank=True)

    class Meta:
        ordering = ["day"]
        constraints = [
            models.UniqueConstraint(fields=["calendar", "day"], name="holiday_once_per_calendar")
        ]

    def __str__(self) -> str:
        return f"{self.day:%Y-%m-%d} {self.name}".strip()


class Cryostat(LabRecord):
    """One cryogen bath of an instrument (the LHe bath, or the LN₂ shield), read on a level
    channel: its size, the level it must never fall below, how a reading maps to litres, and
    what a refill costs in losses, money and ordering time."""

    instrument = models.ForeignKey(Instrument, on_delete=models.PROTECT, related_name="cryostats")
    name = models.CharField(max_length=100, help_text="e.g. LHe bath, LN2 shield")
    cryogen = models.CharField(max_length=3, choices=Cryogen.choices)
    capacity_l = models.FloatField(validators=[MinValueValidator(0.01)])
    minimum_l = models.FloatField(
        validators=[MinValueValidator(0.0)], help_text="the level it must never fall below"
    )
    fill_to_l = models.FloatField(
        null=True, blank=True, help_text="a refill tops up to this (default: the capacity)"
    )
    level_channel = models.ForeignKey(Channel, on_delete=models.PROTECT, related_name="cryostats")
    calibration = models.JSONField(
        null=True,
        blank=True,
        validators=[validate_calibration],
        help_text="reading → litres; empty: linear, 0 L at 0 to the capacity at 100",
    )
    transfer_loss_fraction = models.FloatField(
        null=True,
        blank=True,
        validators=[MinValueValidator(0.0), MaxValueValidator(0.95)],
        help_text="fraction of the liquid drawn lost in the transfer "
        "(default, common practice: 0.2 LHe, 0.1 LN2)",
    )
    line_cooldown_l = models.FloatField(
        null=True,
        blank=True,
        validators=[MinValueValidator(0.0)],
        help_text="litres to cool the transfer line (default, common practice: 1 LHe, 0.5 LN2)",
    )
    price_per_l = models.FloatField(default=0.0, validators=[MinValueValidator(0.0)])
    currency = models.CharField(max_length=3, default="EUR")
    lead_time_working_days = models.PositiveSmallIntegerField(
        default=DEFAULT_LEAD_TIME_WORKING_DAYS,
        help_text="working days between order and delivery (common practice: 5)",
    )
    recovery_flow_channel = models.ForeignKey(
        Channel,
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="+",
        help_text="gas flow into the recovery line or vent (L/min of gas at room temperature)",
    )
    oxygen_channel = models.ForeignKey(
        Channel,
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="+",
        help_text="the room's oxygen monitor, % O2 by volume",
    )
    room_volume_m3 = models.FloatField(null=True, blank=True, validators=[MinValueValidator(0.1)])
    transfer_dewar_l = models.FloatField(
        null=True, blank=True, validators=[MinValueValidator(0.0)], help_text="supply dewar size"
    )

    class Meta:
        ordering = ["instrument", "cryogen", "name"]
        constraints = [
            models.UniqueConstraint(
                fields=["instrument", "name"], name="cryostat_name_per_instrument"
            )
        ]

    def clean(self) -> None:
        errors = {}
        if (
            self.capacity_l is not None
            and self.minimum_l is not None
            and self.minimum_l >= self.capacity_l
        ):
            errors["minimum_l"] = "the minimum must be below the capacity"
        if self.fill_to_l is not None and self.capacity_l is not None:
            if self.fill_to_l > self.capacity_l:
                errors["fill_to_l"] = "a refill cannot go above the capacity"
            if self.minimum_l is not None and self.fill_to_l <= self.minimum_l:
                errors["fill_to_l"] = "a refill must go above the minimum"
        if (
            self.level_channel_id
            and self.instrument_id
            and self.level_channel.instrument_id != self.instrument_id
        ):
            errors["level_channel"] = "the level channel belongs to another instrument"
        if errors:
            raise ValidationError(errors)

    @property
    def loss_fraction(self) -> float:
        if self.transfer_loss_fraction is not None:
            return self.transfer_loss_fraction
        return DEFAULT_LOSS_FRACTION[Cryogen(self.cryogen)]

    @property
    def cooldown_l(self) -> float:
        if self.line_cooldown_l is not None:
            return self.line_cooldown_l
        return DEFAULT_LINE_COOLDOWN_L[Cryogen(self.cryogen)]

    @property
    def target_l(self) -> float:
        return self.fill_to_l if self.fill_to_l is not None else self.capacity_l

    def __str__(self) -> str:
        return f"{self.instrument} · {self.name}"


class Refill(LabRecord):
    """A logged cryogen transfer into a cryostat: when, how much reached the bath, how much
    was drawn from the supply dewar (the difference is the transfer loss), and who filled."""

    cryostat = models.ForeignKey(Cryostat, on_delete=models.PROTECT, related_name="refills")
    at = models.DateTimeField()
    end = models.DateTimeField(null=True, blank=True)
    transferred_l = models.FloatField(
        null=True, blank=True, validators=[MinValueValidator(0.0)], help_text="reached the bath"
    )
    taken_l = models.FloatField(
        null=True, blank=True, validators=[MinValueValidator(0.0)], help_text="left the dewar"
    )
    losses_l = models.FloatField(null=True, blank=True, validators=[MinValueValidator(0.0)])
    level_before_l = models.FloatField(null=True, blank=True)
    level_after_l = models.FloatField(null=True, blank=True)
    supply_dewar = models.CharField(max_length=100, blank=True, help_text="the dewar's tag")
    person = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    notes = models.TextField(blank=True)
    # The same transfer on the instrument's timeline (flags data taken during and after it).
    event = models.OneToOneField(
        InstrumentEvent,
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="cryo_refill",
    )

    class Meta:
        ordering = ["cryostat", "-at"]
        indexes = [models.Index(fields=["cryostat", "at"], name="refill_cryostat_at")]

    def clean(self) -> None:
        errors = {}
        if self.end is not None and self.at is not None and self.end < self.at:
            errors["end"] = "a refill ends after it starts"
        if (
            self.taken_l is not None
            and self.transferred_l is not None
            and self.transferred_l > self.taken_l
        ):
            errors["transferred_l"] = "more cannot reach the bath than left the dewar"
        if errors:
            raise ValidationError(errors)

    def __str__(self) -> str:
        return f"{self.cryostat} refill {self.at:%Y-%m-%d %H:%M}"


class Alert(LabRecord):
    """Something about a cryostat that needs a person: a rising boil-off, a minimum reached
    before anyone is in, a silent level meter, a blocked vent, a low room oxygen. One open
    alert per cryostat and kind; it stays open until acknowledged, even if the condition
    clears (``cleared_at`` says when), so a night-time event is not lost by morning."""

    class Kind(models.TextChoices):
        RATE_RISE = "rate_rise", "boil-off rising"
        MINIMUM_BEFORE_SLOT = "minimum_before_slot", "minimum before the next working slot"
        STALE_LEVEL = "stale_level", "level readings stale"
        RECOVERY_FLOW_ZERO = "recovery_flow_zero", "no gas flow while the bath boils"
        OXYGEN_LOW = "oxygen_low", "room oxygen low"

    class State(models.TextChoices):
        OPEN = "open"
        ACKNOWLEDGED = "acknowledged"

    cryostat = models.ForeignKey(Cryostat, on_delete=models.PROTECT, related_name="alerts")
    kind = models.CharField(max_length=30, choices=Kind.choices)
    state = models.CharField(max_length=15, choices=State.choices, default=State.OPEN)
    message = models.TextField()
    details = models.JSONField(default=dict, blank=True)
    opened_at = models.DateTimeField()
    last_seen_at = models.DateTimeField()
    cleared_at = models.DateTimeField(null=True, blank=True)
    emailed_at = models.DateTimeField(null=True, blank=True)
    acknowledged_at = models.DateTimeField(null=True, blank=True)
    acknowledged_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )

    class Meta:
        ordering = ["-opened_at"]
        constraints = [
            models.UniqueConstraint(
                fields=["cryostat", "kind"],
                condition=Q(state="open"),
                name="one_open_alert_per_cryostat_and_kind",
            )
        ]

    def __str__(self) -> str:
        return f"{self.cryostat}: {self.get_kind_display()} ({self.state})"
