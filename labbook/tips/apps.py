from django.apps import AppConfig


class TipsConfig(AppConfig):
    name = "labbook.tips"
    label = "tips"
    verbose_name = "Tips, mounting periods and conditioning"
