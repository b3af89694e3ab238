"""Every state change of lineage resolution, PROV-JSON and RO-Crate exports, integrity checks: the
one path views, API, tasks and commands call.
"""
