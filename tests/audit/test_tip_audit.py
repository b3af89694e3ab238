"""The tip audit: every dataset a tip took, by the state it was in; the tips behind a set of
datasets."""

from __future__ import annotations

import pytest

from labbook.provenance.audit import tip_audit, tips_of_files

from .conftest import T0, H

pytestmark = pytest.mark.django_db


def test_datasets_are_grouped_by_tip_state(lab, django_assert_max_num_queries):
    with django_assert_max_num_queries(5):
        audit = tip_audit(lab.tip)
    states = [
        (g.mount.pk, [e.pk for e in g.events], [f.original_name for f in g.files])
        for g in audit.groups
    ]
    # "a" was taken before the field emission at T0 + 1.5 h; "b" and "c" after it.
    assert states == [
        (lab.mount.pk, [], ["a.npy"]),
        (lab.mount.pk, [lab.conditioning.pk], ["b.npy", "c.npy"]),
    ]
    assert audit.total == 3 and not audit.outside and not audit.others_in_mounts
    assert all(not g.stale for g in audit.groups)


def test_a_dataset_naming_another_tip_in_the_mount_is_pointed_out(lab, upload_file):
    odd = upload_file("odd.npy", T0 + 4 * H, lab.instrument, 9, tip=lab.other_tip.pk)
    audit = tip_audit(lab.tip)
    assert [f.pk for f in audit.others_in_mounts] == [odd.pk]
    outside = tip_audit(lab.other_tip)
    assert [f.pk for f in outside.outside] == [odd.pk]


def test_tips_of_a_set_of_datasets(lab, upload_file, django_assert_max_num_queries):
    odd = upload_file("odd.npy", T0 + 4 * H, lab.instrument, 9, tip=lab.other_tip.pk)
    bare = upload_file("bare.npy", T0 - 30 * H, lab.instrument, 10)
    ids = [lab.files["a"].pk, lab.files["c"].pk, odd.pk, bare.pk]
    with django_assert_max_num_queries(4):
        uses, untipped = tips_of_files(ids)
    by_tip = {u.tip.name: [(f.file.pk, len(f.events)) for f in u.files] for u in uses}
    assert by_tip == {
        "W-11": [(lab.files["a"].pk, 0), (lab.files["c"].pk, 1)],
        "PtIr-4": [(odd.pk, 0)],
    }
    assert [f.pk for f in untipped] == [bare.pk]


def test_the_pages(lab, member_client):
    page = member_client.get(f"/changes/tips/{lab.tip.pk}/")
    assert page.status_code == 200
    body = page.content.decode()
    assert "a.npy" in body and "field emission" in body
    ids = f"{lab.files['a'].pk},{lab.files['b'].pk}"
    listing = member_client.get("/changes/tips/", {"files": ids})
    assert listing.status_code == 200 and "W-11" in listing.content.decode()
    search = member_client.get("/changes/tips/", {"tip": lab.tip.pk})
    assert "c.npy" in search.content.decode()
    bad = member_client.get("/changes/tips/", {"files": "1,x"})
    assert bad.status_code == 400 and "dataset numbers" in bad.content.decode()
