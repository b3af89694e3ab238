"""The JSON API router of lineage resolution, PROV-JSON and RO-Crate exports, integrity checks."""

from ninja import Router

router = Router(tags=["provenance"])
