"""The refill plan as CSV (one row a refill) and as iCalendar events (RFC 5545).

Both carry times in UTC as well as in the lab's zone, named, so a spreadsheet or a calendar
program in another zone still shows the right instant.
"""

from __future__ import annotations

import csv
import io
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

from icalendar import Calendar, Event

from labbook.cryo.queries import LabPlan

CSV_COLUMNS = (
    "cryostat",
    "instrument",
    "name",
    "cryogen",
    "at_utc",
    "at_local",
    "time_zone",
    "level_before_l",
    "amount_l",
    "order_l",
    "order_by",
    "cost",
)
#: A refill event blocks this long in a calendar (a top-up with the line's cool-down).
EVENT_LENGTH = timedelta(minutes=45)
PRODID = "-//labbook//cryostat refill plan//EN"


def plan_csv(plan: LabPlan, zone: str) -> str:
    tz = ZoneInfo(zone)
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(CSV_COLUMNS)
    for r in plan.refills:
        cryostat = plan.cryostats[r.cryostat]
        writer.writerow(
            [
                cryostat.pk,
                cryostat.instrument.name,
                cryostat.name,
                r.cryogen,
                r.at.astimezone(ZoneInfo("UTC")).strftime("%Y-%m-%dT%H:%M:%SZ"),
                r.at.astimezone(tz).strftime("%Y-%m-%d %H:%M"),
                zone,
                f"{r.level_before_l:.2f}",
                f"{r.amount_l:.2f}",
                f"{r.order_l:.2f}",
                r.order_by.isoformat(),
                f"{r.cost:.2f}",
            ]
        )
    return out.getvalue()


def _uid(cryostat_pk: int, at: datetime, host: str) -> str:
    # Stable for the same planned refill, so a re-imported plan updates rather than duplicates.
    return f"refill-{cryostat_pk}-{at.strftime('%Y%m%dT%H%M%SZ')}@{host}"


def plan_ics(plan: LabPlan, zone: str, *, host: str = "labbook", stamp: datetime) -> bytes:
    """One VEVENT a planned refill (DTSTART/DTEND in UTC), with the litres in the description
    and a reminder on the order-by date as a separate all-day event per cryogen."""
    cal = Calendar()
    cal.add("prodid", PRODID)
    cal.add("version", "2.0")
    cal.add("calscale", "GREGORIAN")
    cal.add("x-wr-calname", "Cryogen refill plan")
    cal.add("x-wr-timezone", zone)
    tz = ZoneInfo(zone)
    for r in plan.refills:
        cryostat = plan.cryostats[r.cryostat]
        event = Event()
        event.add("uid", _uid(cryostat.pk, r.at, host))
        event.add("dtstamp", stamp)
        event.add("dtstart", r.at)
        event.add("dtend", r.at + EVENT_LENGTH)
        event.add("summary", f"{r.cryogen} refill: {cryostat.instrument.name} {cryostat.name}")
        event.add(
            "description",
            f"Transfer {r.amount_l:.1f} L (level before {r.level_before_l:.1f} L); order "
            f"{r.order_l:.1f} L with transfer losses by {r.order_by.isoformat()}. "
            f"Local time {r.at.astimezone(tz):%Y-%m-%d %H:%M} {zone}. "
            "Cryogen transfers follow the local safety rules: trained staff, face shield and "
            "gloves, never alone, oxygen monitor on.",
        )
        event.add("categories", ["cryogen", r.cryogen])
        cal.add_component(event)
    for cryogen, day in sorted(plan.order_by().items()):
        litres = plan.plan.total_order_l.get(cryogen, 0.0)
        order = Event()
        order.add("uid", f"order-{cryogen}-{day.isoformat()}@{host}")
        order.add("dtstamp", stamp)
        order.add("dtstart", day)
        order.add("dtend", day + timedelta(days=1))
        order.add("summary", f"Order {litres:.0f} L {cryogen} (refill plan)")
        cal.add_component(order)
    return cal.to_ical()
