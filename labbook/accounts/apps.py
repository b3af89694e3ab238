from django.apps import AppConfig
from django.db.models.signals import post_migrate

# The setup pages (Django admin) are where managers configure the lab: instruments, chambers,
# channels, people. Their permissions are granted after every migrate, so new models are
# covered as soon as they exist.
MANAGED_APPS = (
    "core",
    "accounts",
    "instruments",
    "logbook",
    "samples",
    "tips",
    "datafiles",
    "provenance",
    "cryo",
)


def grant_manager_permissions(sender, **kwargs) -> None:
    from django.contrib.auth.models import Group, Permission

    from labbook.accounts.permissions import MANAGERS

    managers, _ = Group.objects.get_or_create(name=MANAGERS)
    wanted = Permission.objects.filter(
        content_type__app_label__in=MANAGED_APPS
    ) | Permission.objects.filter(content_type__app_label="auth", content_type__model="user")
    # Records are retired, never deleted: managers get no delete permission on lab records.
    wanted = wanted.exclude(
        codename__startswith="delete_", content_type__app_label__in=MANAGED_APPS[2:]
    )
    managers.permissions.add(*wanted)


class AccountsConfig(AppConfig):
    name = "labbook.accounts"
    label = "accounts"
    verbose_name = "People, groups and API tokens"

    def ready(self) -> None:
        # Not limited to this app: other apps' permissions are created by their own post_migrate.
        post_migrate.connect(grant_manager_permissions, dispatch_uid="labbook-manager-perms")
