"""Background jobs are bookkeeping: shown for diagnosis, never edited by hand."""

from django.contrib import admin

from labbook.core.models import Job


@admin.register(Job)
class JobAdmin(admin.ModelAdmin):
    list_display = ("pk", "kind", "state", "attempts", "created_at", "finished_at")
    list_filter = ("state", "kind")
    readonly_fields = [field.name for field in Job._meta.fields]

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False
