"""Admin (setup) pages of cryostats, the lab calendar and its holidays, refills and alerts;
every change keeps its history. Refills are logged on the cryostat page or through the API
(which also put them on the instrument's timeline); the admin is for setup and corrections."""

from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from labbook.cryo.models import Alert, Cryostat, Holiday, LabCalendar, Refill


@admin.register(Cryostat)
class CryostatAdmin(SimpleHistoryAdmin):
    list_display = ("name", "instrument", "cryogen", "capacity_l", "minimum_l", "retired_at")
    list_filter = ("instrument", "cryogen")
    search_fields = ("name",)
    raw_id_fields = ("level_channel", "recovery_flow_channel", "oxygen_channel")


class HolidayInline(admin.TabularInline):
    model = Holiday
    extra = 1
    fields = ("day", "name", "retired_at")


@admin.register(LabCalendar)
class LabCalendarAdmin(SimpleHistoryAdmin):
    list_display = ("name", "time_zone", "working_days", "day_start", "day_end")
    inlines = [HolidayInline]


@admin.register(Refill)
class RefillAdmin(SimpleHistoryAdmin):
    list_display = ("cryostat", "at", "transferred_l", "taken_l", "losses_l", "person")
    list_filter = ("cryostat",)
    raw_id_fields = ("event",)


@admin.register(Alert)
class AlertAdmin(SimpleHistoryAdmin):
    list_display = ("cryostat", "kind", "state", "opened_at", "cleared_at", "acknowledged_by")
    list_filter = ("state", "kind", "cryostat")
    readonly_fields = ("message", "details", "opened_at", "last_seen_at", "emailed_at")
