from django.apps import AppConfig


class LogbookConfig(AppConfig):
    name = "labbook.logbook"
    label = "logbook"
    verbose_name = "Sessions, notes and the instrument's timeline"
