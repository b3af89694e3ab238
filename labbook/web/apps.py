from django.apps import AppConfig


class WebConfig(AppConfig):
    name = "labbook.web"
    label = "web"
    verbose_name = "Pages: layout, dashboard, shared parts"
