"""Tables of tips, their mounting periods and conditioning events.

A tip's state behind a dataset is its whole history since it was last put into the scanner
(FIELD.md §2): which tip, mounted when, and every field emission, pulse, indentation or
pick-up since. These three tables hold exactly that.
"""

from __future__ import annotations

from django.conf import settings
from django.core.exceptions import ValidationError
from django.db import models
from django.db.models import Q

from labbook.core.models import LabRecord


class Tip(LabRecord):
    """A probe tip: a wire (etched W, cut PtIr, …), and for nc-AFM the force sensor it sits on.

    The sensor's resonance frequency f0, quality factor Q and stiffness k are kept measured and
    nominal side by side, because the stiffness of a sensor carrying a tip differs from its
    data-sheet value and nc-AFM forces are only as good as the k used to compute them.
    """

    class Origin(models.TextChoices):
        ETCHED = "etched", "etched"
        CUT = "cut", "cut"
        OTHER = "other", "other"

    class SensorKind(models.TextChoices):
        NONE = "", "none (STM tip)"
        TUNING_FORK = "tuning_fork", "tuning-fork force sensor"
        CANTILEVER = "cantilever", "cantilever"

    name = models.CharField(max_length=100, unique=True, help_text="what the lab calls it")
    material = models.CharField(max_length=50, help_text="W, PtIr, Au, Cr, …")
    origin = models.CharField(max_length=10, choices=Origin.choices, default=Origin.OTHER)
    identifier = models.CharField(
        max_length=100, blank=True, help_text="label or serial on the tip holder"
    )
    preparation = models.TextField(
        blank=True,
        help_text="how it was made, e.g. 0.25 mm W wire etched in 2 M NaOH, drop-off cut-off",
    )
    prepared_at = models.DateTimeField(null=True, blank=True)
    notes = models.TextField(blank=True)

    # Force sensor (nc-AFM). Empty for a plain STM tip.
    sensor_kind = models.CharField(
        max_length=20, choices=SensorKind.choices, default=SensorKind.NONE, blank=True
    )
    resonance_frequency_hz = models.FloatField(null=True, blank=True, help_text="measured f0")
    resonance_frequency_nominal_hz = models.FloatField(null=True, blank=True)
    quality_factor = models.FloatField(
        null=True, blank=True, help_text="measured Q (at the temperature it is used at)"
    )
    stiffness_n_per_m = models.FloatField(null=True, blank=True, help_text="measured k")
    stiffness_nominal_n_per_m = models.FloatField(null=True, blank=True)
    stiffness_method = models.CharField(
        max_length=100,
        blank=True,
        help_text="how k was measured, e.g. thermal noise, static deflection, geometry",
    )

    created_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )

    SENSOR_FIELDS = (
        "resonance_frequency_hz",
        "resonance_frequency_nominal_hz",
        "quality_factor",
        "stiffness_n_per_m",
        "stiffness_nominal_n_per_m",
    )

    class Meta:
        ordering = ["name"]

    def __str__(self) -> str:
        return self.name

    def clean(self) -> None:
        errors = {}
        for name in self.SENSOR_FIELDS:
            value = getattr(self, name)
            if value is None:
                continue
            if not self.sensor_kind:
                errors[name] = "only a force sensor has this; set sensor_kind first"
            elif value <= 0:
                errors[name] = "must be more than 0"
        if self.stiffness_method and not self.sensor_kind:
            errors["stiffness_method"] = "only a force sensor has this; set sensor_kind first"
        if errors:
            raise ValidationError(errors)


class TipMount(LabRecord):
    """A period during which a tip sat in an instrument's scanner: from ``start`` until
    ``end`` (open while it is still mounted).

    A scanner holds one tip at a time and a tip is in one instrument at a time, so the periods
    of one instrument never overlap, nor do those of one tip. Periods are half-open
    [start, end): a new tip may go in at the very instant the old one came out.
    """

    tip = models.ForeignKey(Tip, on_delete=models.PROTECT, related_name="mounts")
    instrument = models.ForeignKey(
        "instruments.Instrument", on_delete=models.PROTECT, related_name="tip_mounts"
    )
    start = models.DateTimeField()
    end = models.DateTimeField(null=True, blank=True, help_text="open while mounted")
    mounted_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    notes = models.TextField(blank=True, help_text="e.g. from carousel slot 3")

    class Meta:
        ordering = ["instrument", "start"]
        indexes = [
            models.Index(fields=["instrument", "start"], name="tipmount_instrument_start"),
            models.Index(fields=["tip", "start"], name="tipmount_tip_start"),
        ]
        constraints = [
            models.CheckConstraint(
                condition=Q(end__isnull=True) | Q(end__gt=models.F("start")),
                name="tipmount_ends_after_start",
                violation_error_message="a mount ends after it starts",
            ),
            # The database's own guard against two requests mounting at once; the actions give
            # the clear error first. On PostgreSQL an exclusion constraint (migration 0002)
            # also refuses overlapping closed periods.
            models.UniqueConstraint(
                fields=["instrument"],
                condition=Q(end__isnull=True, retired_at__isnull=True),
                name="tipmount_one_open_per_instrument",
                violation_error_message="this instrument already has a tip mounted",
            ),
            models.UniqueConstraint(
                fields=["tip"],
                condition=Q(end__isnull=True, retired_at__isnull=True),
                name="tipmount_one_open_per_tip",
                violation_error_message="this tip is already mounted",
            ),
        ]

    def __str__(self) -> str:
        until = "open" if self.end is None else f"{self.end:%Y-%m-%d %H:%M}"
        return f"{self.tip} in {self.instrument} from {self.start:%Y-%m-%d %H:%M} ({until})"

    def covers(self, at) -> bool:
        return self.start <= at and (self.end is None or at < self.end)


class Conditioning(LabRecord):
    """Something done to a tip to shape or dress its apex: field emission, a voltage pulse,
    a controlled indentation into the substrate, the pick-up of a molecule or atom
    (functionalisation, e.g. CO or Xe), or anything else.

    ``params`` holds the values in the unit their key names ("voltage_v", "depth_m"),
    ``params_raw`` what was typed ("2 nm"), so nothing the operator wrote is lost.
    """

    class ConditioningKind(models.TextChoices):
        FIELD_EMISSION = "field_emission", "field emission"
        PULSE = "pulse", "voltage pulse"
        INDENTATION = "indentation", "indentation"
        FUNCTIONALISATION = "functionalisation", "functionalisation"
        OTHER = "other", "other"

    # Named apart from the other record kinds so each has its own OpenAPI component.
    Kind = ConditioningKind

    tip = models.ForeignKey(Tip, on_delete=models.PROTECT, related_name="conditioning")
    instrument = models.ForeignKey(
        "instruments.Instrument",
        on_delete=models.PROTECT,
        related_name="tip_conditioning",
        help_text="where it happened: the instrument the tip was mounted in, or given",
    )
    kind = models.CharField(max_length=20, choices=Kind.choices)
    at = models.DateTimeField()
    params = models.JSONField(default=dict, blank=True)
    params_raw = models.JSONField(default=dict, blank=True)
    outcome = models.TextField(blank=True, help_text="what the tip did afterwards")
    performed_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )

    class Meta:
        ordering = ["tip", "at"]
        verbose_name_plural = "conditioning events"
        indexes = [
            models.Index(fields=["tip", "at"], name="conditioning_tip_at"),
            models.Index(fields=["instrument", "at"], name="conditioning_instrument_at"),
        ]

    def __str__(self) -> str:
        return f"{self.get_kind_display()} on {self.tip} at {self.at:%Y-%m-%d %H:%M}"
