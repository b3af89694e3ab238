from __future__ import annotations

from collections.abc import Iterable

from django.db import models


def save_record(
    record: models.Model,
    actor,
    *,
    trusted: Iterable[str] = (),
    validate_unique: bool = True,
) -> models.Model:
    """Validate and save a lab record, attributing the history row to ``actor``.

    Actions call this instead of ``save()`` so that a change made by a command or a worker
    (no request, so no middleware to name the user) still records who made it.

    ``trusted``: fields the caller has just set from objects it holds (the actor as uploader,
    say), whose validation would only ask the database again whether the referenced row
    exists. ``validate_unique=False`` where the unique fields and the model's constraints are
    enforced by the database and the caller handles its IntegrityError (each check is a
    query of its own).
    """
    record._history_user = actor if getattr(actor, "is_authenticated", False) else None
    record.full_clean(
        exclude=list(trusted) or None,
        validate_unique=validate_unique,
        validate_constraints=validate_unique,
    )
    record.save()
    return record
