"""Celery tasks of acquired files: storage, readers, ingestion, thumbnails and statistics: they
take ids, lock the row and are idempotent.
"""
