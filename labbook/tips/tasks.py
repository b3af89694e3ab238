"""Celery tasks of tips, their mounting periods and conditioning events: they take ids, lock the
row and are idempotent.
"""
