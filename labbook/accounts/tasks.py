"""Celery tasks of people, groups and API tokens: they take ids, lock the row and are idempotent."""
