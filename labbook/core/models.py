from __future__ import annotations

from collections.abc import Callable

from django.conf import settings
from django.db import models
from simple_history.models import HistoricalRecords

#: Checks run before a record is deleted; each raises to refuse (the provenance app registers
#: the one that names the datasets depending on the record). Django's own check of protected
#: keys runs later, so without this its generic message would come first.
delete_guards: list[Callable[[models.Model], None]] = []


class LabRecord(models.Model):
    """A record of the lab's: it keeps its full change history (who, when, what changed) and is
    retired rather than deleted, because datasets may depend on it.

    Every domain model derives from this, so history works the same on SQLite and PostgreSQL.
    """

    created_at = models.DateTimeField(auto_now_add=True)
    updated_at = models.DateTimeField(auto_now=True)
    retired_at = models.DateTimeField(null=True, blank=True)

    history = HistoricalRecords(inherit=True)

    class Meta:
        abstract = True

    @property
    def is_retired(self) -> bool:
        return self.retired_at is not None

    def delete(self, *args, **kwargs):
        for guard in delete_guards:
            guard(self)
        return super().delete(*args, **kwargs)


class Job(models.Model):
    """A piece of background work, written to the database before it is queued.

    The row is the truth; the broker message is only a wake-up call. If Redis is down when the
    work is queued, or a worker dies mid-task, the row stays ``pending`` and the periodic sweep
    queues it again, so nothing is lost.
    """

    class State(models.TextChoices):
        PENDING = "pending"
        RUNNING = "running"
        DONE = "done"
        FAILED = "failed"

    kind = models.CharField(max_length=100, db_index=True)
    params = models.JSONField(default=dict, blank=True)
    state = models.CharField(max_length=10, choices=State.choices, default=State.PENDING)
    attempts = models.PositiveIntegerField(default=0)
    result = models.JSONField(null=True, blank=True)
    error = models.TextField(blank=True)
    created_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.SET_NULL, related_name="+"
    )
    created_at = models.DateTimeField(auto_now_add=True)
    queued_at = models.DateTimeField(null=True, blank=True)
    started_at = models.DateTimeField(null=True, blank=True)
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        indexes = [models.Index(fields=["state", "queued_at"], name="job_state_queued")]
        ordering = ["-created_at"]

    def __str__(self) -> str:
        return f"{self.kind} #{self.pk} ({self.state})"
