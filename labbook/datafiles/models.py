"""Acquired files: the bytes as the microscope wrote them (content-addressed, never changed),
what was read from them, and the lineage resolved when they arrived."""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.db.models import F
from django.db.models.functions import Floor

from labbook.core.models import LabRecord

#: Width of a bias band (V) of the banded search index: a 0.1 V range touches one or two.
BIAS_BAND_V = 0.1
#: The columns a search filters on, carried by its newest-first indexes so that a walk along
#: one tests each entry without reading the row (an index-only scan).
SEARCH_FILTER_COLUMNS = (
    "bias_v",
    "coverage_ml",
    "setpoint_a",
    "retired_at",
    "kind",
    "status",
    "instrument_id",
    "sample_id",
    "tip_id",
)


class AcquiredFile(LabRecord):
    """One dataset: an image, a spectrum or a grid, as the instrument wrote it.

    The bytes are stored once under their SHA-256 and never modified; the same bytes uploaded
    twice are one dataset. A file that cannot be read keeps its bytes and the reason
    (``status = unreadable``). Metadata, statistics and lineage are stored, so a search never
    recomputes them; a correction (the wrong tip was logged) re-resolves the lineage and the
    history keeps both versions.
    """

    class Status(models.TextChoices):
        PENDING = "pending"
        READY = "ready"
        UNREADABLE = "unreadable"

    class Kind(models.TextChoices):
        TOPOGRAPH = "topograph"
        CURRENT = "current", "current image"
        SPECTRUM = "spectrum"
        GRID = "grid", "spectroscopy grid"
        OTHER = "other"

    sha256 = models.CharField(max_length=64, unique=True)
    size_bytes = models.BigIntegerField()
    storage_name = models.CharField(
        max_length=200, help_text="where the bytes are in the file storage"
    )
    original_name = models.CharField(max_length=255)
    source = models.CharField(max_length=20, default="upload", help_text="upload, ingest or watch")
    source_path = models.CharField(max_length=1000, blank=True, help_text="where it was picked up")
    uploaded_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )

    status = models.CharField(max_length=12, choices=Status.choices, default=Status.PENDING)
    error = models.TextField(blank=True)
    reader = models.CharField(max_length=50, blank=True)
    attempts = models.PositiveIntegerField(default=0)
    queued_at = models.DateTimeField(null=True, blank=True)
    processed_at = models.DateTimeField(null=True, blank=True)

    # Normalised metadata, as columns where searches need them (units in the names).
    kind = models.CharField(max_length=12, choices=Kind.choices, default=Kind.OTHER)
    acquired_at = models.DateTimeField(null=True, blank=True)
    bias_v = models.FloatField(null=True, blank=True)
    # floor(bias_v / BIAS_BAND_V): the search for a bias range walks one newest-first index run
    # per band and merges them (queries.page_ids_sql), instead of walking every dataset's entry.
    bias_band = models.GeneratedField(
        expression=Floor(F("bias_v") / BIAS_BAND_V),
        output_field=models.FloatField(),
        db_persist=True,
    )
    setpoint_a = models.FloatField(null=True, blank=True)
    temperature_k = models.FloatField(null=True, blank=True)
    channel_name = models.CharField(max_length=100, blank=True)
    # Everything normalised (scan size, pixels, lock-in, AFM …) and what the upload said.
    metadata = models.JSONField(default=dict, blank=True)
    given_metadata = models.JSONField(
        default=dict, blank=True, help_text="metadata sent with the file"
    )
    raw_header = models.JSONField(default=dict, blank=True)

    # Lineage resolved at ingestion and stored.
    instrument = models.ForeignKey(
        "instruments.Instrument",
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="files",
    )
    operator = models.ForeignKey(
        settings.AUTH_USER_MODEL,
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="acquired_files",
    )
    sample = models.ForeignKey(
        "samples.Sample", null=True, blank=True, on_delete=models.PROTECT, related_name="files"
    )
    preparation = models.ForeignKey(
        "samples.Preparation",
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="files",
        help_text="the last preparation of the sample before acquisition",
    )
    tip = models.ForeignKey(
        "tips.Tip", null=True, blank=True, on_delete=models.PROTECT, related_name="files"
    )
    # Total nominal coverage since the last cleaning (ML, all adsorbates); per adsorbate in
    # FileCoverage. Stored so that search by coverage is an index range scan.
    coverage_ml = models.FloatField(null=True, blank=True)
    lineage = models.JSONField(
        default=dict, blank=True, help_text="surface, tip and instrument state"
    )
    lineage_resolved_at = models.DateTimeField(null=True, blank=True)

    stats = models.JSONField(default=dict, blank=True)
    thumbnail_name = models.CharField(max_length=200, blank=True)

    class Meta:
        ordering = ["-acquired_at", "-id"]
        indexes = [
            # Search by bias and coverage, newest first (PERFORMANCE.md §5: a composite index
            # plus one on the sort key answers in about a millisecond).
            models.Index(fields=["bias_v", "coverage_ml"], name="file_bias_coverage"),
            # Newest first, carrying the filtered columns: a search walks this index alone
            # (an index-only scan) until it has a page of ids, then fetches those rows; the
            # walk skips ~14,000 non-matching entries in about a millisecond where fetching
            # each row to test it took 10-15 ms (1,000,000 datasets, bench "files").
            models.Index(
                fields=["-acquired_at", "-id"],
                include=SEARCH_FILTER_COLUMNS,
                name="file_newest_covering",
            ),
            # The same, one run per bias band: a bias-range search merges a few runs newest
            # first and skips ~10–20× fewer entries than on file_newest_covering.
            models.Index(
                fields=["bias_band", "-acquired_at", "-id"],
                include=SEARCH_FILTER_COLUMNS,
                name="file_bias_band_newest",
            ),
            models.Index(fields=["setpoint_a"], name="file_setpoint"),
            models.Index(fields=["status", "queued_at"], name="file_status_queued"),
        ]

    def __str__(self) -> str:
        return f"{self.original_name} ({self.sha256[:12]})"


class FileCoverage(models.Model):
    """The nominal coverage of one adsorbate on the sample when a file was acquired."""

    file = models.ForeignKey(AcquiredFile, on_delete=models.CASCADE, related_name="coverages")
    material = models.CharField(max_length=100)
    coverage_ml = models.FloatField()
    uncertainty_ml = models.FloatField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["file", "material"], name="coverage_once_per_file")
        ]
        indexes = [models.Index(fields=["material", "coverage_ml"], name="coverage_material_value")]

    def __str__(self) -> str:
        return f"{self.material} {self.coverage_ml:.3g} ML on {self.file_id}"
