"""The JSON API router of samples, recipes, deposition sources and preparations."""

from __future__ import annotations

from ninja import Router

router = Router(tags=["samples"])
