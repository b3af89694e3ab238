from django.apps import AppConfig


class DatafilesConfig(AppConfig):
    name = "labbook.datafiles"
    label = "datafiles"
    verbose_name = "Acquired files and their ingestion"
