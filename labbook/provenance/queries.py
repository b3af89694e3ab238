"""Read-side queries of lineage resolution, PROV-JSON and RO-Crate exports, integrity checks; other
apps read through these.
"""
