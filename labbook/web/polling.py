"""How often an htmx part that follows background work asks again (an upload's rows and
batch, a crate's progress): every second at first, then every ten seconds, so a page left open
while no worker runs (a broker outage) does not ask forever at 1 Hz."""

from __future__ import annotations

from django.http import HttpRequest

#: Polls at 1 Hz before slowing down: two minutes.
FAST_POLLS = 120


def poll_every(polls: int) -> str:
    """The ``hx-trigger`` interval after ``polls`` answers."""
    return "1s" if polls < FAST_POLLS else "10s"


def polls_so_far(request: HttpRequest) -> int:
    """The count the part sends back with each poll (``?polls=``), bounded; 0 if absent."""
    text = str(request.GET.get("polls", "0"))
    return min(int(text), 10_000) if text.isdigit() else 0
