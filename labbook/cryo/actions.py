"""Every state change of cryostats, refills, boil-off forecasts, refill plans and alerts: the one
path views, API, tasks and commands call.
"""
