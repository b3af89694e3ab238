from django.apps import AppConfig


class ProvenanceConfig(AppConfig):
    name = "labbook.provenance"
    label = "provenance"
    verbose_name = "Lineage, PROV and RO-Crate exports, integrity"
