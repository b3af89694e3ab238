"""The pages of cryostats, refills, boil-off forecasts, refill plans and alerts."""
