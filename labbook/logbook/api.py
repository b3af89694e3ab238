"""The JSON API router of the logbook app."""

from __future__ import annotations

from ninja import Router

router = Router(tags=["logbook"])
