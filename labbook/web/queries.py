"""What the dashboard shows, composed from the domain apps' own queries."""

from __future__ import annotations

from django.utils import timezone

from labbook.instruments import queries as instrument_queries


def dashboard_summary() -> dict:
    now = timezone.now()
    instruments = []
    for instrument in instrument_queries.instruments_for(None).prefetch_related("chambers"):
        instruments.append(
            {
                "instrument": instrument,
                "chambers": list(instrument.chambers.all()),
                "latest": instrument_queries.latest_readings(instrument, at=now),
                "reading_count": instrument_queries.reading_count(instrument),
            }
        )
    return {"now": now, "instruments": instruments}
