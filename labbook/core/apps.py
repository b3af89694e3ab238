from django.apps import AppConfig


class CoreConfig(AppConfig):
    name = "labbook.core"
    label = "core"
    verbose_name = "Shared foundations: history, background work, health"
