from django.apps import AppConfig


class InstrumentsConfig(AppConfig):
    name = "labbook.instruments"
    label = "instruments"
    verbose_name = "Instruments, chambers, channels and readings"
