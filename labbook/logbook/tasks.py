"""Celery tasks of sessions, notes and the instrument's timeline: they take ids, lock the row and
are idempotent.
"""
