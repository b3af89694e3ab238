"""A record's history on its page: who changed what, when, old → new, escaped, in a bounded
number of queries."""

from __future__ import annotations

import pytest

from labbook.core.records import save_record
from labbook.provenance.audit import record_history

pytestmark = pytest.mark.django_db


def test_history_names_who_changed_which_field_from_what_to_what(lab, member, manager):
    sample = lab.sample
    sample.notes = "polished by the supplier"
    save_record(sample, manager)
    newest, created = record_history(sample)[:2]
    assert newest.action == "changed" and newest.user == manager
    assert [(c.field, c.old, c.new) for c in newest.changes] == [
        ("notes", "—", "polished by the supplier")
    ]
    assert created.action == "created" and created.user == member


def test_a_mount_moved_to_another_tip_shows_on_both_tips_with_names(lab, manager):
    mount = lab.mount
    mount.tip = lab.other_tip
    save_record(mount, manager)
    on_old = record_history(lab.tip)
    on_new = record_history(lab.other_tip)
    moved = [e for e in on_old if e.type_key == "mount" and e.action == "changed"]
    assert len(moved) == 1
    assert [(c.field, c.old, c.new) for c in moved[0].changes] == [("tip", "W-11", "PtIr-4")]
    assert any(e.type_key == "mount" and e.changes for e in on_new)
    assert moved[0].url == f"/tips/{lab.other_tip.pk}/#mount-{mount.pk}"


def test_retiring_is_shown_as_retired(lab, manager):
    from labbook.provenance.retirement import retire

    retire([lab.other_tip], actor=manager)
    assert record_history(lab.other_tip)[0].action == "retired"


def test_query_count_does_not_grow_with_the_history(
    lab, manager, member, django_assert_max_num_queries
):
    tip = lab.tip
    for index in range(30):
        tip.notes = f"check {index}"
        tip.identifier = f"holder {index}"
        save_record(tip, manager if index % 2 else member)
    with django_assert_max_num_queries(6):
        entries = record_history(tip)
    assert len([e for e in entries if e.type_key == "tip"]) == 31


@pytest.mark.parametrize(
    "page",
    ["sample", "preparation", "tip", "instrument"],
)
def test_detail_pages_show_the_changes_escaped(lab, manager, member_client, page):
    lab.tip.notes = "<script>alert(1)</script>"
    save_record(lab.tip, manager)
    lab.sample.notes = "<b>bold</b>"
    save_record(lab.sample, manager)
    url = {
        "sample": f"/samples/{lab.sample.pk}/",
        "preparation": f"/samples/preparations/{lab.preparation.pk}/",
        "tip": f"/tips/{lab.tip.pk}/",
        "instrument": f"/instruments/{lab.instrument.pk}/",
    }[page]
    response = member_client.get(url)
    assert response.status_code == 200
    body = response.content.decode()
    assert 'id="changes"' in body
    assert "<script>alert(1)</script>" not in body and "<b>bold</b>" not in body
    if page == "tip":
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in body
        assert f"/changes/tips/{lab.tip.pk}/" in body
    if page == "sample":
        assert "&lt;b&gt;bold&lt;/b&gt;" in body


def test_event_page_shows_its_history(lab, member, member_client):
    from datetime import timedelta

    from labbook.instruments.models import InstrumentEvent

    from .conftest import T0

    event = InstrumentEvent(
        instrument=lab.instrument, kind="maintenance", start=T0, end=T0 + timedelta(hours=1)
    )
    save_record(event, member)
    event.summary = "replaced the ion pump controller"
    save_record(event, member)
    body = member_client.get(f"/instruments/events/{event.pk}/").content.decode()
    assert 'id="changes"' in body and "replaced the ion pump controller" in body


def test_linked_names_cost_one_query_per_linked_kind(
    lab, manager, django_capture_on_commit_callbacks, django_assert_max_num_queries
):
    from datetime import timedelta

    from labbook.datafiles.models import AcquiredFile

    from .conftest import T0

    transfer = lab.sample.transfers.get()
    for hours in (2.5, -48, 2.5, -48):  # the sample's arrival moved back and forth
        transfer.at = T0 + timedelta(hours=hours)
        with django_capture_on_commit_callbacks(execute=True):
            save_record(transfer, manager)
    record = AcquiredFile.objects.get(pk=lab.files["b"].pk)
    # The rows (their users joined), then one query per linked kind the changes name: the
    # processing row set tip and operator, the corrections sample and preparation (the
    # preparations' samples joined): 1 + 4, however many corrections there were.
    with django_assert_max_num_queries(5):
        entries = record_history(record)
    named = [c for e in entries for c in e.changes if c.field in ("sample", "preparation")]
    assert {c.new for c in named if c.field == "sample"} >= {"Cu(111) #5", "—"}
    assert any(c.field == "preparation" and c.new.startswith("Cu(111) #5 at") for c in named)
