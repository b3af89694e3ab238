"""The JSON API router of cryostats, refills, boil-off forecasts, refill plans and alerts."""

from ninja import Router

router = Router(tags=["cryostats"])
