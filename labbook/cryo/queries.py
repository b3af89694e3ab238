"""Read-side queries of cryostats, refills, boil-off forecasts, refill plans and alerts; other apps
read through these.
"""
