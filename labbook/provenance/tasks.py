"""Celery tasks of lineage resolution, PROV-JSON and RO-Crate exports, integrity checks: they take
ids, lock the row and are idempotent.
"""
