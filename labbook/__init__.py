"""labbook: the lab record of UHV low-temperature scanning-probe microscopes."""

from labbook.celery import app as celery_app

__all__ = ["celery_app"]
__version__ = "0.1.0"
