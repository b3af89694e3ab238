from django.apps import AppConfig


class CryoConfig(AppConfig):
    name = "labbook.cryo"
    label = "cryo"
    verbose_name = "Cryostats, refills, forecasts and plans"
