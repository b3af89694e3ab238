"""The demo lab's cryostats: the LHe bath and LN2 shield of LTM-1 on their level channels."""

from __future__ import annotations

from labbook.demo import DemoContext


def load_cryostats(ctx: DemoContext) -> dict[str, int]:
    return {}
