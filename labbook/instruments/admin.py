"""Setup pages of instruments, chambers and channels; every change keeps its history."""

from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from labbook.instruments.models import Chamber, Channel, Instrument
from labbook.provenance.retirement import RetireNotDeleteAdmin


class ChamberInline(admin.TabularInline):
    model = Chamber
    extra = 0
    fields = ("name", "kind", "retired_at")


@admin.register(Instrument)
class InstrumentAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("name", "time_zone", "retired_at")
    search_fields = ("name", "description")
    inlines = [ChamberInline]


@admin.register(Channel)
class ChannelAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("name", "instrument", "quantity", "unit", "gas", "location", "retired_at")
    list_filter = ("instrument", "quantity")
    search_fields = ("name", "location")
