from __future__ import annotations

from zoneinfo import available_timezones

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

    class Meta:
        ordering = ["instrument", "name"]
        constraints = [
            models.UniqueConstraint(
                fields=["instrument", "name"], name="channel_name_per_instrument"
            )
        ]

    def __str__(self) -> str:
        return f"{self.instrument} · {self.name} [{self.unit}]"


class Reading(models.Model):
    """One logged value of a channel at an instant (UTC), in the channel's unit.

    Readings are facts from a logger, not edited records: they carry no history of their own.
    They are unique on (channel, t) so a logger may resend a batch after a timeout.
    """

    id = models.BigAutoField(primary_key=True)
    channel = models.ForeignKey(Channel, on_delete=models.PROTECT, related_name="readings")
    t = models.DateTimeField()
    value = models.FloatField()

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["channel", "t"], name="reading_once_per_instant")
        ]

    def __str__(self) -> str:
        return f"{self.channel_id} @ {self.t.isoformat()} = {self.value}"
