"""Retirement, not deletion: records a dataset depends on cannot be deleted (ORM, queryset,
admin); they can be retired, and the dataset still resolves to them."""

from __future__ import annotations

import pytest
from django.db import transaction
from django.db.models import ProtectedError

from labbook.datafiles.models import AcquiredFile
from labbook.logbook.models import Session
from labbook.provenance.retirement import RecordInUse, retire
from labbook.tips.models import Conditioning, Tip, TipMount

pytestmark = pytest.mark.django_db


@pytest.mark.parametrize("which", ["mount", "conditioning", "session", "transfer", "step"])
def test_records_behind_a_dataset_refuse_deletion_naming_the_datasets(lab, which):
    record = {
        "mount": lambda: lab.mount,
        "conditioning": lambda: lab.conditioning,
        "session": lambda: lab.session,
        "transfer": lambda: lab.sample.transfers.get(),
        "step": lambda: lab.preparation.steps.get(),
    }[which]()
    with pytest.raises(RecordInUse) as refused, transaction.atomic():
        record.delete()
    message = str(refused.value.args[0])
    assert "cannot be deleted" in message and "Retire it instead" in message
    assert "b.npy" in message  # every one of these is behind dataset "b"
    assert type(record).objects.filter(pk=record.pk).exists()


def test_records_behind_a_dataset_by_key_are_refused_naming_the_datasets(lab):
    for record in (lab.tip, lab.sample, lab.instrument, lab.preparation):
        with pytest.raises(RecordInUse) as refused, transaction.atomic():
            record.delete()
        assert "Retire it instead" in str(refused.value)
    assert Tip.objects.filter(pk=lab.tip.pk).exists()
    # A queryset delete skips Model.delete(); Django's protected keys still refuse it.
    with pytest.raises(ProtectedError), transaction.atomic():
        Tip.objects.filter(pk=lab.tip.pk).delete()
    assert Tip.objects.filter(pk=lab.tip.pk).exists()


def test_queryset_delete_is_refused(lab):
    with pytest.raises(RecordInUse), transaction.atomic():
        TipMount.objects.filter(pk=lab.mount.pk).delete()
    with pytest.raises(RecordInUse), transaction.atomic():
        Session.objects.all().delete()
    assert TipMount.objects.filter(pk=lab.mount.pk).exists() and Session.objects.exists()


def test_a_record_no_dataset_depends_on_can_be_deleted(lab, member):
    from datetime import timedelta

    from labbook.tips.actions import record_conditioning

    from .conftest import T0

    # After the last dataset: nothing was measured in this state.
    late = record_conditioning(
        lab.tip, kind="pulse", at=T0 + timedelta(hours=5), params={}, actor=member
    )
    late.delete()
    assert not Conditioning.objects.filter(pk=late.pk).exists()


def test_retired_records_still_resolve(lab, member, manager):
    from labbook.datafiles.lineage import resolve
    from labbook.provenance.audit import reresolve_file

    retire([lab.tip, lab.sample, lab.instrument], actor=manager)
    record = AcquiredFile.objects.get(pk=lab.files["b"].pk)
    assert (record.tip, record.sample, record.instrument) == (lab.tip, lab.sample, lab.instrument)
    found = resolve(
        acquired_at=record.acquired_at,
        metadata=record.given_metadata,
        instrument=record.instrument,
        uploaded_by=record.uploaded_by,
    )
    assert (found.tip, found.sample, found.preparation) == (lab.tip, lab.sample, lab.preparation)
    assert reresolve_file(record.pk) is False  # the stored lineage is still right
    assert Tip.objects.get(pk=lab.tip.pk).retired_at is not None
    assert lab.tip.history.first().history_user == manager


def test_admin_delete_page_refuses_and_names_the_datasets(lab, admin_client):
    url = f"/admin/tips/tipmount/{lab.mount.pk}/delete/"
    page = admin_client.get(url)
    assert page.status_code == 200
    body = page.content.decode()
    assert "cannot be deleted" in body and "b.npy" in body
    # A POST anyway deletes nothing.
    admin_client.post(url, {"post": "yes"})
    assert TipMount.objects.filter(pk=lab.mount.pk).exists()


def test_admin_bulk_delete_is_refused_and_retire_action_works(lab, admin_client, admin_user):
    changelist = "/admin/tips/conditioning/"
    refused = admin_client.post(
        changelist,
        {"action": "delete_selected", "_selected_action": [lab.conditioning.pk], "post": "yes"},
    )
    assert refused.status_code in (200, 302)
    assert Conditioning.objects.filter(pk=lab.conditioning.pk).exists()
    retired = admin_client.post(
        changelist,
        {"action": "retire_selected", "_selected_action": [lab.conditioning.pk]},
        follow=True,
    )
    assert retired.status_code == 200 and "1 record retired" in retired.content.decode()
    assert Conditioning.objects.get(pk=lab.conditioning.pk).retired_at is not None
    assert (
        Conditioning.objects.get(pk=lab.conditioning.pk).history.first().history_user == admin_user
    )
