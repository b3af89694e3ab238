"""Admin (setup) pages of tips, their mounting periods and conditioning events; every change
keeps its history. Mounting and conditioning are logged through the API or the pages, which
check overlaps; the admin is for corrections."""

from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from labbook.provenance.retirement import RetireNotDeleteAdmin
from labbook.tips.models import Conditioning, Tip, TipMount


class TipMountInline(admin.TabularInline):
    model = TipMount
    extra = 0
    fields = ("instrument", "start", "end", "mounted_by", "notes", "retired_at")


@admin.register(Tip)
class TipAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("name", "material", "origin", "sensor_kind", "identifier", "retired_at")
    list_filter = ("material", "origin", "sensor_kind")
    search_fields = ("name", "identifier", "preparation", "notes")
    inlines = [TipMountInline]


@admin.register(TipMount)
class TipMountAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("tip", "instrument", "start", "end", "retired_at")
    list_filter = ("instrument",)
    search_fields = ("tip__name", "notes")


@admin.register(Conditioning)
class ConditioningAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("tip", "kind", "at", "instrument", "retired_at")
    list_filter = ("kind", "instrument")
    search_fields = ("tip__name", "outcome")
    readonly_fields = ("params_raw",)  # what was typed stays as typed
