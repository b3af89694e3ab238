from django.contrib import admin

from labbook.accounts.models import ApiToken


@admin.register(ApiToken)
class ApiTokenAdmin(admin.ModelAdmin):
    list_display = (
        "hint",
        "user",
        "label",
        "instrument",
        "read_only",
        "created_at",
        "last_used_at",
        "revoked_at",
    )
    list_filter = ("read_only", "instrument")
    search_fields = ("user__username", "label", "hint")
    readonly_fields = ("token_hash", "hint", "created_at", "last_used_at")

    def has_add_permission(self, request):
        # A token minted here could never be shown; mint it with `manage.py mint_token`.
        return False
