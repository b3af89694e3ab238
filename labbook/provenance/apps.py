from django.apps import AppConfig


class ProvenanceConfig(AppConfig):
    name = "labbook.provenance"
    label = "provenance"
    verbose_name = "Lineage, PROV and RO-Crate exports, integrity"

    def ready(self) -> None:
        from django.db.models.signals import post_save, pre_delete

        from labbook.core.models import delete_guards

        # export_jobs registers the crate-export job handler (web and worker alike).
        from labbook.provenance import audit, export_jobs, retirement  # noqa: F401

        # Records a dataset depends on are retired, never deleted (retirement.py).
        for model in retirement.PROTECTED_MODELS:
            pre_delete.connect(
                retirement.refuse_delete, sender=model, dispatch_uid=f"retire-not-delete-{model}"
            )
        delete_guards.append(_refuse_delete_naming_the_datasets)
        # A record corrected after the fact (the wrong tip on a mount, a transfer at the wrong
        # time) re-resolves the lineage of the datasets it touches, once the change commits.
        # Connected here, after simple_history's own receiver, so the new history row exists.
        for model in audit.RERESOLVED_BY:
            post_save.connect(_reresolve, sender=model, dispatch_uid=f"reresolve-lineage-{model}")


def _refuse_delete_naming_the_datasets(record) -> None:
    from labbook.provenance import retirement

    if isinstance(record, retirement.PROTECTED_MODELS):
        retirement.refuse_delete(type(record), record)


def _reresolve(sender, instance, raw: bool = False, **kwargs) -> None:
    if raw:  # loading fixtures: the records are not being corrected
        return
    from labbook.provenance.audit import reresolve_affected_files

    reresolve_affected_files(sender, instance)
