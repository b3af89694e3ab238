"""Celery tasks of the pages' shared parts: they take ids, lock the row and are idempotent."""
