"""Setup pages of samples, recipes, deposition sources and calibrations; history kept."""

from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from labbook.provenance.retirement import RetireNotDeleteAdmin
from labbook.samples.models import (
    DepositionSource,
    Preparation,
    PreparationStep,
    RateCalibration,
    Recipe,
    Sample,
    Transfer,
)


class TransferInline(admin.TabularInline):
    model = Transfer
    extra = 0
    fields = ("at", "location", "instrument", "moved_by", "notes")


@admin.register(Sample)
class SampleAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("name", "substrate", "identifier", "retired_at")
    search_fields = ("name", "substrate", "identifier", "notes")
    inlines = [TransferInline]


@admin.register(Recipe)
class RecipeAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("name", "version", "substrate", "retired_at")
    search_fields = ("name", "description")
    readonly_fields = ("version", "previous", "steps")  # a new version is made by revising


@admin.register(DepositionSource)
class DepositionSourceAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("name", "material", "kind", "instrument", "retired_at")


@admin.register(RateCalibration)
class RateCalibrationAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("source", "measured_at", "model", "rate_ml_per_min", "uncertainty_ml_per_min")
    readonly_fields = ("parameters", "covariance", "points", "residual_std")


class StepInline(admin.StackedInline):
    model = PreparationStep
    extra = 0
    can_delete = False


@admin.register(Preparation)
class PreparationAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("sample", "instrument", "operator", "started_at", "recipe")
    list_filter = ("instrument", "sample")
    date_hierarchy = "started_at"
    inlines = [StepInline]
