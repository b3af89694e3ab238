"""The JSON API router of cryostats, refills, boil-off forecasts, refill plans and alerts."""
