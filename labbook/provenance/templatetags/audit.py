"""``{% load audit %}{% record_history obj %}``: a record's change history on its page (who
changed what, when, old → new per field). Everything shown is escaped by the template."""

from __future__ import annotations

from typing import Any

from django import template

from labbook.provenance.audit import _KEY_OF_MODEL, TYPES_BY_KEY
from labbook.provenance.audit import record_history as _history

register = template.Library()


@register.inclusion_tag("provenance/audit/_history.html", takes_context=True)
def record_history(context, record, limit: int = 200) -> dict[str, Any]:
    key = _KEY_OF_MODEL.get(type(record))
    entries = [] if key is None or record is None else _history(record, limit=limit)
    return {
        "record": record,
        "entries": entries,
        "type_key": key,
        "type_label": TYPES_BY_KEY[key].label if key else "",
        "limit": limit,
        "lab_time_zone": context.get("lab_time_zone"),
    }
