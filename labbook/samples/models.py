"""Samples, where they are, the recipes they are prepared by, and every preparation with the
values actually used and the doses derived from them."""

from __future__ import annotations

from django.conf import settings
from django.db import models

from labbook.core.models import LabRecord


class Sample(LabRecord):
    """A physical specimen: a substrate crystal with its surface, e.g. the lab's Cu(111)
    crystal #3. Its surface changes with every preparation; the crystal stays the same."""

    name = models.CharField(
        max_length=100, unique=True, help_text="what the lab calls it, e.g. Cu(111) #3"
    )
    substrate = models.CharField(max_length=50, help_text="material and surface, e.g. Cu(111)")
    material = models.CharField(
        max_length=30, blank=True, help_text="e.g. Cu; read from the substrate"
    )
    facet = models.CharField(
        max_length=20, blank=True, help_text="e.g. 111; read from the substrate"
    )
    identifier = models.CharField(
        max_length=100, blank=True, help_text="serial or label on the holder"
    )
    supplier = models.CharField(max_length=100, blank=True)
    supplier_lot = models.CharField(max_length=100, blank=True)
    # One monolayer of this surface, atoms per cm² (from the lattice constant where known);
    # coverages "per substrate atom" are counted against it.
    monolayer_density_per_cm2 = models.FloatField(null=True, blank=True)
    notes = models.TextField(blank=True)

    class Meta:
        ordering = ["name"]

    def __str__(self) -> str:
        return self.name


class Location(models.TextChoices):
    PREPARATION_CHAMBER = "preparation_chamber", "preparation chamber"
    MICROSCOPE_STAGE = "microscope_stage", "microscope stage"
    LOAD_LOCK = "load_lock", "load lock"
    STORAGE = "storage", "in-vacuum storage"
    OUTSIDE = "outside", "out of vacuum"


class Transfer(LabRecord):
    """A sample moved to a new place at a time: the sample's location over time is the chain
    of its transfers."""

    sample = models.ForeignKey(Sample, on_delete=models.PROTECT, related_name="transfers")
    at = models.DateTimeField()
    location = models.CharField(max_length=30, choices=Location.choices)
    instrument = models.ForeignKey(
        "instruments.Instrument",
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="sample_transfers",
    )
    moved_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    notes = models.TextField(blank=True)

    class Meta:
        ordering = ["sample", "at"]
        indexes = [models.Index(fields=["sample", "at"], name="transfer_sample_at")]

    def __str__(self) -> str:
        return f"{self.sample} → {self.get_location_display()} at {self.at:%Y-%m-%d %H:%M}"


class Recipe(LabRecord):
    """A named, versioned list of steps ("Cu(111) clean: 3 × sputter/anneal").

    Editing a recipe writes a new version; the old one stays, because the preparations that
    used it keep pointing at exactly the steps they followed."""

    name = models.CharField(max_length=100)
    version = models.PositiveIntegerField(default=1)
    description = models.TextField(blank=True)
    substrate = models.CharField(
        max_length=50, blank=True, help_text="the surfaces it is meant for"
    )
    # The template steps as given (numbers or quantity strings), validated on save.
    steps = models.JSONField(default=list)
    previous = models.OneToOneField(
        "self", null=True, blank=True, on_delete=models.PROTECT, related_name="next_version"
    )
    created_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )

    class Meta:
        ordering = ["name", "-version"]
        constraints = [
            models.UniqueConstraint(fields=["name", "version"], name="recipe_version_once")
        ]

    def __str__(self) -> str:
        return f"{self.name} v{self.version}"


class DepositionSource(LabRecord):
    """An evaporator, crucible or doser on an instrument, whose rate is calibrated."""

    class SourceKind(models.TextChoices):
        KNUDSEN_CELL = "knudsen_cell", "Knudsen cell / crucible"
        ELECTRON_BEAM = "electron_beam", "e-beam evaporator"
        SUBLIMATION = "sublimation", "sublimation source"
        OTHER = "other"

    # Named apart from the other record kinds so each has its own OpenAPI component.
    Kind = SourceKind

    instrument = models.ForeignKey(
        "instruments.Instrument", on_delete=models.PROTECT, related_name="deposition_sources"
    )
    name = models.CharField(max_length=100)
    material = models.CharField(max_length=100)
    kind = models.CharField(max_length=20, choices=Kind.choices, default=Kind.KNUDSEN_CELL)
    notes = models.TextField(blank=True)

    class Meta:
        ordering = ["instrument", "name"]
        constraints = [
            models.UniqueConstraint(
                fields=["instrument", "name"], name="source_name_per_instrument"
            )
        ]

    def __str__(self) -> str:
        return f"{self.name} ({self.material})"


class RateCalibration(LabRecord):
    """A source's deposition rate fitted from measured coverages, with its uncertainty.

    A deposit step that takes its rate from a source records which calibration it used, so a
    later recalibration never silently changes an old coverage."""

    class Method(models.TextChoices):
        STM_AREA_FRACTION = "stm_area_fraction", "STM area fraction"
        QCM = "qcm", "quartz crystal microbalance"
        XPS = "xps", "XPS / AES"
        OTHER = "other"

    source = models.ForeignKey(
        DepositionSource, on_delete=models.PROTECT, related_name="calibrations"
    )
    measured_at = models.DateTimeField()
    model = models.CharField(max_length=20, help_text="constant, proportional or arrhenius")
    method = models.CharField(
        max_length=20, choices=Method.choices, default=Method.STM_AREA_FRACTION
    )
    coverage_definition = models.CharField(max_length=20, default="substrate_atom")
    rate_ml_per_min = models.FloatField()
    uncertainty_ml_per_min = models.FloatField()
    reference_setting = models.FloatField(null=True, blank=True)
    parameters = models.JSONField(default=list)
    covariance = models.JSONField(default=list)
    residual_std = models.FloatField()
    # The measured points: [{"setting", "duration_s", "coverage_ml"}], kept as evidence.
    points = models.JSONField(default=list)
    notes = models.TextField(blank=True)

    class Meta:
        ordering = ["source", "-measured_at"]
        get_latest_by = "measured_at"

    def __str__(self) -> str:
        return (
            f"{self.source} {self.rate_ml_per_min:.3g} ± {self.uncertainty_ml_per_min:.2g} ML/min"
        )


class Preparation(LabRecord):
    """A recipe (or ad-hoc steps) applied to a sample on an instrument, with the values used."""

    sample = models.ForeignKey(Sample, on_delete=models.PROTECT, related_name="preparations")
    instrument = models.ForeignKey(
        "instruments.Instrument", on_delete=models.PROTECT, related_name="preparations"
    )
    operator = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="preparations"
    )
    started_at = models.DateTimeField()
    ended_at = models.DateTimeField(null=True, blank=True)
    recipe = models.ForeignKey(
        Recipe,
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="preparations",
        help_text="the recipe version followed, if any",
    )
    notes = models.TextField(blank=True)

    class Meta:
        ordering = ["-started_at"]
        indexes = [models.Index(fields=["sample", "started_at"], name="preparation_sample_time")]
        constraints = [
            # The same preparation sent twice at once (a client that timed out and retried
            # while the first request still ran) is stored once: the check in
            # record_preparation alone could let both through.
            models.UniqueConstraint(
                fields=["sample", "instrument", "started_at"],
                condition=models.Q(retired_at__isnull=True),
                name="one_live_preparation_per_start",
            )
        ]

    def __str__(self) -> str:
        return f"{self.sample} at {self.started_at:%Y-%m-%d %H:%M}"


class PreparationStep(LabRecord):
    """One step of a preparation as it was done: the values as logged (canonical units, the
    raw input kept beside them) and the quantities derived from them at logging time."""

    class Kind(models.TextChoices):
        SPUTTER = "sputter"
        ANNEAL = "anneal"
        DEPOSIT = "deposit"
        DOSE = "dose", "gas dose"
        OTHER = "other"

    preparation = models.ForeignKey(Preparation, on_delete=models.PROTECT, related_name="steps")
    position = models.PositiveSmallIntegerField()
    kind = models.CharField(max_length=10, choices=Kind.choices)
    cleans = models.BooleanField(default=False, help_text="the surface is clean after this step")
    notes = models.TextField(blank=True)
    description = models.CharField(max_length=500, blank=True)
    duration_s = models.FloatField(null=True, blank=True)
    # What was typed or sent, field by field, before unit conversion ("2e-6 mbar").
    raw_input = models.JSONField(default=dict, blank=True)

    # sputter and dose
    gas = models.CharField(max_length=20, blank=True)
    gauge_gas = models.CharField(max_length=20, blank=True)
    pressure_mbar = models.FloatField(null=True, blank=True, help_text="as the gauge reads it")
    pressure_mbar_corrected = models.FloatField(
        null=True, blank=True, help_text="true pressure of the gas"
    )
    # sputter
    energy_ev = models.FloatField(null=True, blank=True)
    current_a = models.FloatField(null=True, blank=True, help_text="sample (drain) current")
    beam_area_cm2 = models.FloatField(null=True, blank=True)
    secondary_electron_yield = models.FloatField(null=True, blank=True)
    fluence_per_cm2 = models.FloatField(null=True, blank=True)
    # anneal
    temperature_k = models.FloatField(null=True, blank=True)
    temperature_source = models.CharField(max_length=20, blank=True)
    thermocouple_mv = models.FloatField(null=True, blank=True)
    thermocouple_type = models.CharField(max_length=2, blank=True)
    cold_junction_c = models.FloatField(null=True, blank=True)
    pyrometer_emissivity = models.FloatField(null=True, blank=True)
    heater_current_a = models.FloatField(null=True, blank=True)
    heater_power_w = models.FloatField(null=True, blank=True)
    ramp_k_per_s = models.FloatField(null=True, blank=True)
    method = models.CharField(max_length=20, blank=True)
    # deposit
    material = models.CharField(max_length=100, blank=True)
    source = models.ForeignKey(
        DepositionSource, null=True, blank=True, on_delete=models.PROTECT, related_name="steps"
    )
    calibration = models.ForeignKey(
        RateCalibration, null=True, blank=True, on_delete=models.PROTECT, related_name="steps"
    )
    rate_ml_per_min = models.FloatField(null=True, blank=True, help_text="as given in the step")
    rate_used_ml_per_min = models.FloatField(null=True, blank=True)
    rate_origin = models.CharField(max_length=20, blank=True)
    source_temperature_k = models.FloatField(null=True, blank=True)
    flux_current_a = models.FloatField(null=True, blank=True)
    sample_temperature_k = models.FloatField(null=True, blank=True)
    coverage_ml = models.FloatField(null=True, blank=True)
    coverage_uncertainty_ml = models.FloatField(null=True, blank=True)
    coverage_definition = models.CharField(max_length=20, blank=True)
    # dose
    chamber_temperature_k = models.FloatField(null=True, blank=True)
    exposure_langmuir = models.FloatField(
        null=True, blank=True, help_text="p·t as the gauge reads it"
    )
    exposure_langmuir_corrected = models.FloatField(
        null=True, blank=True, help_text="at the true pressure"
    )
    impingement_per_cm2 = models.FloatField(null=True, blank=True)

    class Meta:
        ordering = ["preparation", "position"]
        constraints = [
            models.UniqueConstraint(fields=["preparation", "position"], name="step_position_once")
        ]

    def __str__(self) -> str:
        return f"{self.preparation} · {self.position + 1}. {self.kind}"
