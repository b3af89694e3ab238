"""Celery tasks of cryostats: the periodic alert check (beat, every 15 min). They take ids,
lock the row and are idempotent: a second run at the same instant opens no second alert."""

from __future__ import annotations

import logging

from celery import shared_task
from django.utils import timezone

from labbook.cryo import actions, queries

log = logging.getLogger(__name__)


@shared_task(acks_late=True)
def check_cryostat_alerts(cryostat_id: int | None = None) -> dict:
    """Check one cryostat (or every one) for alert conditions; returns {cryostat id: kinds
    opened now}. One cryostat's failure is logged and does not stop the others."""
    now = timezone.now()
    found = queries.cryostats()
    if cryostat_id is not None:
        found = found.filter(pk=cryostat_id)
    opened: dict[str, list[str]] = {}
    for cryostat in found:
        try:
            opened[str(cryostat.pk)] = [a.kind for a in actions.check_alerts(cryostat, now)]
        except Exception:  # noqa: BLE001 - the next cryostat must still be checked
            log.exception("alert check of %s failed", cryostat)
            opened[str(cryostat.pk)] = ["error"]
    return opened
