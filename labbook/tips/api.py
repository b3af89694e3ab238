"""The JSON API router of the tips app."""

from __future__ import annotations

from ninja import Router

router = Router(tags=["tips"])
