"""Celery tasks of cryostats, refills, boil-off forecasts, refill plans and alerts: they take ids,
lock the row and are idempotent.
"""
