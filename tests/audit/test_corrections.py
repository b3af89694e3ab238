"""A record corrected after the fact re-resolves the lineage of the datasets it touches, and
the dataset's history keeps the old and the new."""

from __future__ import annotations

import pytest

from labbook.core.records import save_record
from labbook.datafiles.models import AcquiredFile
from labbook.provenance.audit import record_history

from .conftest import T0, H, M

pytestmark = pytest.mark.django_db


def _fresh(record):
    return AcquiredFile.objects.get(pk=record.pk)


def test_the_wrong_tip_on_a_mount_corrected_moves_its_datasets(
    lab, manager, django_capture_on_commit_callbacks
):
    mount = lab.mount
    mount.tip = lab.other_tip
    with django_capture_on_commit_callbacks(execute=True):
        save_record(mount, manager)
    for name in ("a", "b", "c"):
        record = _fresh(lab.files[name])
        assert record.tip == lab.other_tip
        assert record.lineage["tip_state"]["tip"] == lab.other_tip.pk
        # The field emission was logged on W-11, not on the tip really mounted.
        assert record.lineage["tip_state"]["events"] == []
    history = record_history(_fresh(lab.files["b"]))
    corrected = history[0]
    assert corrected.user == manager and "tip mount" in corrected.reason
    changes = {c.field: (c.old, c.new) for c in corrected.changes}
    assert changes["tip"] == ("W-11", "PtIr-4")


def test_a_mount_start_corrected_takes_earlier_datasets_out(
    lab, manager, django_capture_on_commit_callbacks
):
    mount = lab.mount
    mount.start = T0 + 90 * M  # it really went in after "a" was taken
    with django_capture_on_commit_callbacks(execute=True):
        save_record(mount, manager)
    assert _fresh(lab.files["a"]).tip is None
    assert _fresh(lab.files["b"]).tip == lab.tip


def test_conditioning_logged_late_enters_the_tip_state(
    lab, member, django_capture_on_commit_callbacks
):
    from labbook.tips.actions import record_conditioning

    with django_capture_on_commit_callbacks(execute=True):
        late = record_conditioning(
            lab.tip, kind="pulse", at=T0 + 150 * M, params={"voltage_v": "3 V"}, actor=member
        )
    assert [e["id"] for e in _fresh(lab.files["c"]).lineage["tip_state"]["events"]] == [
        lab.conditioning.pk,
        late.pk,
    ]
    assert [e["id"] for e in _fresh(lab.files["b"]).lineage["tip_state"]["events"]] == [
        lab.conditioning.pk
    ]


def test_a_transfer_corrected_changes_the_sample(lab, manager, django_capture_on_commit_callbacks):
    transfer = lab.sample.transfers.get()
    transfer.at = T0 + 150 * M  # the sample reached the stage after "b"
    with django_capture_on_commit_callbacks(execute=True):
        save_record(transfer, manager)
    assert _fresh(lab.files["b"]).sample is None
    assert _fresh(lab.files["c"]).sample == lab.sample


def test_an_unchanged_lineage_writes_no_history_row(
    lab, manager, django_capture_on_commit_callbacks
):
    before = lab.files["a"].history.count()
    mount = lab.mount
    mount.notes = "from carousel slot 2"
    with django_capture_on_commit_callbacks(execute=True):
        save_record(mount, manager)
    assert _fresh(lab.files["a"]).history.count() == before


def test_correct_file_re_resolves_and_keeps_both(lab, member):
    from labbook.datafiles.actions import correct_file

    correct_file(lab.files["a"], changes={"tip": lab.other_tip.pk}, actor=member)
    record = _fresh(lab.files["a"])
    assert record.tip == lab.other_tip
    newest, older = record.history.all()[:2]
    assert (older.tip_id, newest.tip_id) == (lab.tip.pk, lab.other_tip.pk)


def test_mounting_a_new_tip_now_leaves_old_datasets_alone(
    lab, member, django_capture_on_commit_callbacks
):
    from labbook.tips.actions import mount_tip

    with django_capture_on_commit_callbacks(execute=True):
        mount_tip(lab.other_tip, lab.instrument, start=T0 + 10 * H, actor=member)
    assert {_fresh(f).tip for f in lab.files.values()} == {lab.tip}


def test_a_mount_retired_as_logged_in_error_leaves_its_datasets_without_a_tip(
    lab, manager, django_capture_on_commit_callbacks
):
    from labbook.provenance.audit import tip_audit
    from labbook.provenance.retirement import retire

    with django_capture_on_commit_callbacks(execute=True):
        retire([lab.mount], actor=manager)
    assert {_fresh(f).tip for f in lab.files.values()} == {None}
    # The old lineage is kept in the datasets' history; the tip audit no longer counts them.
    older = _fresh(lab.files["a"]).history.all()[1]
    assert older.tip_id == lab.tip.pk
    assert tip_audit(lab.tip).total == 0


def test_the_tip_audit_points_out_a_stored_state_that_is_out_of_date(lab):
    # A stored lineage written before the field emission was logged (as if it came late and
    # the re-resolution had not run): the audit compares it with the records.
    record = _fresh(lab.files["c"])
    record.lineage = {**record.lineage, "tip_state": {**record.lineage["tip_state"], "events": []}}
    record.save()
    from labbook.provenance.audit import tip_audit

    audit = tip_audit(lab.tip)
    assert [g.stale for g in audit.groups] == [[], [record.pk]]


def test_a_json_field_change_names_the_keys_it_changed_not_the_whole_value():
    from labbook.datafiles.models import AcquiredFile
    from labbook.provenance.audit import _format_pair

    lineage = AcquiredFile._meta.get_field("lineage")
    before = {"tip_state": {"tip": 1}, "surface_state": {"coverages": []}, "flags": []}
    after = {"tip_state": {"tip": 2}, "surface_state": {"coverages": []}, "flags": [], "x": 1}
    was, now = _format_pair(before, after, lineage, {})
    assert (was, now) == ("3 entries", "4 entries; changed: tip_state, x")
    many_old = {f"k{i}": i for i in range(10)}
    many_new = {f"k{i}": i + 1 for i in range(10)}
    assert _format_pair(many_old, many_new, lineage, {})[1].endswith("k5 and 4 more")
    assert _format_pair(None, [1, 2], lineage, {}) == ("—", "2 items")
