"""Celery tasks of instruments, chambers, channels and readings: they take ids, lock the row and
are idempotent.
"""
