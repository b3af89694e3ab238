from django.apps import AppConfig


class DatafilesConfig(AppConfig):
    name = "labbook.datafiles"
    label = "datafiles"
    verbose_name = "Acquired files and their ingestion"

    def ready(self) -> None:
        from labbook.core.tasks import pending_sweepers
        from labbook.datafiles.tasks import sweep_pending_files

        # Files are recorded as pending before their message is sent: the core sweep finds
        # those whose message was lost and queues them again.
        pending_sweepers["files"] = sweep_pending_files
