"""The demo lab: an invented surface-physics group with one low-temperature microscope, LTM-1.

``python manage.py demo`` (see :mod:`labbook.demo.load`) builds it step by step; each step is
idempotent. Everything here is invented for the demo (DESIGN.md §5): no real person, lab or
paper, and the one demo password is for demo data only.

This module stays free of Django imports so that :mod:`labbook.demo.readings` (pure numpy) can
be imported without a configured project.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from labbook.demo.readings import Scenario


@dataclass
class DemoContext:
    """What the steps share: the window of demo time, where to report, and the records earlier
    steps made (people by username, the manager who acts for the lab, the instrument, its
    chambers and channels by name). A later step reads what it needs from here."""

    now: datetime
    days: int
    start: datetime
    report: Callable[[str], None]
    users: dict[str, Any] = field(default_factory=dict)
    manager: Any = None
    instrument: Any = None
    chambers: dict[str, Any] = field(default_factory=dict)
    channels: dict[str, Any] = field(default_factory=dict)
    scenario: Scenario | None = None
