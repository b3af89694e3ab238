"""Celery tasks of samples, recipes and preparations with their derived doses: they take ids, lock
the row and are idempotent.
"""
