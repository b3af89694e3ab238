"""Admin (setup) pages of sessions and notes; every change keeps its history. The timeline is
composed from the other apps' records and has no admin of its own."""

from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from labbook.logbook.models import Note, Session
from labbook.provenance.retirement import RetireNotDeleteAdmin


@admin.register(Session)
class SessionAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("instrument", "operator", "start", "end", "goal", "retired_at")
    list_filter = ("instrument",)
    search_fields = ("goal", "summary", "operator__username")


@admin.register(Note)
class NoteAdmin(RetireNotDeleteAdmin, SimpleHistoryAdmin):
    list_display = ("at", "instrument", "author", "session", "sample", "tip", "retired_at")
    list_filter = ("instrument",)
    search_fields = ("text",)
