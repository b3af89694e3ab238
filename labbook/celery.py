import os

from celery import Celery
from celery.signals import worker_init

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "labbook.settings")

app = Celery("labbook")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()


@worker_init.connect
def _yield_the_cores_to_requests(**_kwargs) -> None:
    """Lower a worker's CPU priority before it starts (a prefork pool's children inherit it):
    thumbnails and statistics wait a little, the pages and the API do not (settings
    ``LABBOOK_WORKER_NICE``)."""
    from django.conf import settings

    increment = max(0, min(19, int(getattr(settings, "LABBOOK_WORKER_NICE", 0))))
    if increment and os.nice(0) < increment:
        os.nice(increment - os.nice(0))
