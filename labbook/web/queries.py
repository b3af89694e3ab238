"""What the dashboard shows, composed from the domain apps' own queries."""

from __future__ import annotations

from datetime import timedelta

from django.db.models import Prefetch
from django.utils import timezone

from labbook.instruments import queries as instrument_queries
from labbook.instruments.models import Chamber


def dashboard_summary() -> dict:
    now = timezone.now()
    instruments = []
    live_chambers = Prefetch("chambers", queryset=Chamber.objects.filter(retired_at__isnull=True))
    for instrument in instrument_queries.instruments_for(None).prefetch_related(live_chambers):
        instruments.append(
            {
                "instrument": instrument,
                "chambers": list(instrument.chambers.all()),
                "latest": instrument_queries.latest_readings(instrument, at=now),
                # A day's count walks the (channel, t) index; a count of all time would scan
                # years of readings on every dashboard load.
                "reading_count": instrument_queries.reading_count(
                    instrument, since=now - timedelta(days=1)
                ),
            }
        )
    return {"now": now, "instruments": instruments}
