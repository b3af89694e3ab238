from __future__ import annotations

from zoneinfo import available_timezones

from django.conf import settings
from django.core.exceptions import ValidationError
from django.db import models

from labbook.core.models import LabRecord


def validate_time_zone(value: str) -> None:
    if value not in available_timezones():
        raise ValidationError(f"{value!r} is not an IANA time zone (e.g. Europe/Berlin)")


class Instrument(LabRecord):
    """A microscope: its chambers, its logged channels and its cryostat belong to it."""

    name = models.CharField(max_length=100, unique=True)
    description = models.TextField(blank=True)
    time_zone = models.CharField(max_length=64, default="UTC", validators=[validate_time_zone])

    class Meta:
        ordering = ["name"]

    def __str__(self) -> str:
        return self.name


class Chamber(LabRecord):
    """One vacuum chamber of an instrument: where samples are prepared, measured or loaded."""

    class Kind(models.TextChoices):
        PREPARATION = "preparation", "preparation chamber"
        MICROSCOPE = "microscope", "microscope chamber"
        LOAD_LOCK = "load_lock", "load lock"
        OTHER = "other", "other"

    instrument = models.ForeignKey(Instrument, on_delete=models.PROTECT, related_name="chambers")
    name = models.CharField(max_length=100)
    kind = models.CharField(max_length=20, choices=Kind.choices, default=Kind.OTHER)

    class Meta:
        ordering = ["instrument", "name"]
        constraints = [
            models.UniqueConstraint(
                fields=["instrument", "name"], name="chamber_name_per_instrument"
            )
        ]

    def __str__(self) -> str:
        return f"{self.instrument} · {self.name}"


class Channel(LabRecord):
    """One logged quantity of an instrument, e.g. the prep chamber's ion gauge or the helium
    bath level. Values are stored in the channel's canonical unit."""

    class Quantity(models.TextChoices):
        PRESSURE = "pressure"
        TEMPERATURE = "temperature"
        CRYOGEN_LEVEL = "cryogen_level", "cryogen level"
        OTHER = "other"

    instrument = models.ForeignKey(Instrument, on_delete=models.PROTECT, related_name="channels")
    chamber = models.ForeignKey(
        Chamber, null=True, blank=True, on_delete=models.PROTECT, related_name="channels"
    )
    name = models.CharField(max_length=100)
    quantity = models.CharField(max_length=20, choices=Quantity.choices)
    unit = models.CharField(
        max_length=30, help_text="canonical unit of the stored values, e.g. mbar, K, %"
    )
    location = models.CharField(max_length=200, blank=True, help_text="where the sensor sits")
    gas = models.CharField(
        max_length=20, blank=True, help_text="pressure gauges: the gas the gauge is calibrated for"
    )
    expected_interval_s = models.FloatField(
        null=True,
        blank=True,
        help_text="how often the logger reads it; a reading older than 3× this is stale",
    )

    class Meta:
        ordering = ["instrument", "name"]
        constraints = [
            models.UniqueConstraint(
                fields=["instrument", "name"], name="channel_name_per_instrument"
            )
        ]

    def __str__(self) -> str:
        return f"{self.instrument} · {self.name} [{self.unit}]"


class InstrumentEvent(LabRecord):
    """Something that happened to an instrument over a stretch of time and matters for every
    dataset taken during or after it: a bake-out, a cryogen transfer, a vent, a pump failure."""

    class Kind(models.TextChoices):
        BAKEOUT = "bakeout", "bake-out"
        CRYOGEN_TRANSFER = "cryogen_transfer", "cryogen transfer"
        VENT = "vent"
        PUMP_FAILURE = "pump_failure", "pump failure"
        MAINTENANCE = "maintenance"
        OTHER = "other"

    instrument = models.ForeignKey(Instrument, on_delete=models.PROTECT, related_name="events")
    chamber = models.ForeignKey(
        Chamber,
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="events",
        help_text="the chamber it happened in; empty when it concerns the whole instrument",
    )
    kind = models.CharField(max_length=20, choices=Kind.choices)
    start = models.DateTimeField()
    end = models.DateTimeField(null=True, blank=True, help_text="open while it lasts")
    summary = models.CharField(max_length=200, blank=True)
    # Kind-specific facts: a bake-out's zone temperatures {"zone": K} and the base pressure
    # after it; a transfer's cryogen and litres.
    details = models.JSONField(default=dict, blank=True)
    recorded_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )

    class Meta:
        ordering = ["instrument", "-start"]
        indexes = [models.Index(fields=["instrument", "start"], name="event_instrument_start")]

    def __str__(self) -> str:
        return f"{self.instrument} {self.get_kind_display()} from {self.start:%Y-%m-%d %H:%M}"


class Reading(models.Model):
    """One logged value of a channel at an instant (UTC), in the channel's unit.

    Readings are facts from a logger, not edited records: they carry no history of their own.
    The key is (channel, t), so a logger may resend a batch after a timeout and each instant
    is stored once. On PostgreSQL the table is partitioned by year of ``t``
    (``labbook/instruments/partitions.py``) so that ten years of logging stay fast and an old
    year can be detached and archived whole.
    """

    pk = models.CompositePrimaryKey("channel_id", "t")
    channel = models.ForeignKey(Channel, on_delete=models.PROTECT, related_name="readings")
    t = models.DateTimeField()
    value = models.FloatField()

    def __str__(self) -> str:
        return f"{self.channel_id} @ {self.t.isoformat()} = {self.value}"
