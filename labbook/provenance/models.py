"""Tables of lineage resolution, PROV-JSON and RO-Crate exports, integrity checks."""
