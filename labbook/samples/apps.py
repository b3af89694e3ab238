from django.apps import AppConfig


class SamplesConfig(AppConfig):
    name = "labbook.samples"
    label = "samples"
    verbose_name = "Samples, recipes and preparations"
