from __future__ import annotations

from django.db import models


def save_record(record: models.Model, actor) -> models.Model:
    """Validate and save a lab record, attributing the history row to ``actor``.

    Actions call this instead of ``save()`` so that a change made by a command or a worker
    (no request, so no middleware to name the user) still records who made it.
    """
    record._history_user = actor if getattr(actor, "is_authenticated", False) else None
    record.full_clean()
    record.save()
    return record
