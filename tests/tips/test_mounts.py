"""Mounting periods: one tip in a scanner at a time, a tip in one instrument at a time."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.core.exceptions import ValidationError
from django.db import IntegrityError, connection, transaction

from labbook.tips import actions, queries
from labbook.tips.models import TipMount
from tests.tips.conftest import T0

pytestmark = pytest.mark.django_db

H = timedelta(hours=1)


def messages(excinfo) -> dict[str, str]:
    return {field: " ".join(errors) for field, errors in excinfo.value.message_dict.items()}


def test_an_overlapping_mount_on_the_same_instrument_is_refused_naming_it(
    member, instrument, tip, other_tip
):
    first = actions.mount_tip(tip, instrument, start=T0, end=T0 + 2 * H, actor=member).mount
    with pytest.raises(ValidationError) as refused:
        actions.mount_tip(other_tip, instrument, start=T0 + H, actor=member)
    assert list(messages(refused)) == ["start"]
    assert f"mount #{first.pk}: tip W-12 in LTM-T" in messages(refused)["start"]
    assert "LTM-T holds one tip at a time" in messages(refused)["start"]
    assert TipMount.objects.count() == 1


def test_a_mount_running_into_a_later_one_names_its_end(member, instrument, tip, other_tip):
    later = actions.mount_tip(tip, instrument, start=T0 + 2 * H, actor=member).mount
    with pytest.raises(ValidationError) as refused:
        actions.mount_tip(other_tip, instrument, start=T0, end=T0 + 3 * H, actor=member)
    assert f"mount #{later.pk}" in messages(refused)["end"]


def test_the_same_tip_cannot_be_in_two_instruments(member, instrument, other_instrument, tip):
    there = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    with pytest.raises(ValidationError) as refused:
        actions.mount_tip(tip, other_instrument, start=T0 + H, actor=member)
    message = messages(refused)["start"]
    assert "a tip is in one instrument at a time" in message
    assert f"mount #{there.pk}: tip W-12 in LTM-T from 2026-03-02 09:00 UTC, still mounted" in (
        message
    )
    # close_previous never ends the tip's stay in another microscope: when it left is unknown.
    there.refresh_from_db()
    assert there.end is None


def test_mounting_a_new_tip_closes_the_open_mount_at_the_new_start(
    member, manager, instrument, tip, other_tip
):
    old = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    mounted = actions.mount_tip(other_tip, instrument, start=T0 + 3 * H, actor=manager)
    old.refresh_from_db()
    assert old.end == T0 + 3 * H
    assert mounted.closed_previous == old
    assert mounted.mount.end is None
    closing = old.history.first()
    assert closing.history_type == "~" and closing.history_user == manager
    assert queries.tip_mounted(instrument, T0 + 3 * H - timedelta(seconds=1)).tip == tip
    assert queries.tip_mounted(instrument, T0 + 3 * H).tip == other_tip


def test_without_close_previous_an_open_mount_is_refused(member, instrument, tip, other_tip):
    old = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    with pytest.raises(ValidationError) as refused:
        actions.mount_tip(other_tip, instrument, start=T0 + H, close_previous=False, actor=member)
    assert f"mount #{old.pk}" in messages(refused)["start"]
    old.refresh_from_db()
    assert old.end is None


def test_a_refused_mount_leaves_the_previous_one_open(
    member, instrument, other_instrument, tip, other_tip
):
    """Closing the previous mount and the refusal happen in one transaction: all or nothing."""
    old = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    actions.mount_tip(other_tip, other_instrument, start=T0 + 5 * H, end=T0 + 6 * H, actor=member)
    # other_tip goes into the other microscope at 5 h, so an open mount from 2 h is refused …
    with pytest.raises(ValidationError):
        actions.mount_tip(other_tip, instrument, start=T0 + 2 * H, actor=member)
    # … and the open mount it would have closed stays open.
    old.refresh_from_db()
    assert old.end is None


def test_remounting_an_already_mounted_tip_is_refused(member, instrument, tip):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    with pytest.raises(ValidationError):
        actions.mount_tip(tip, instrument, start=T0 + H, actor=member)


def test_back_to_back_mounts_share_the_instant_of_the_exchange(member, instrument, tip, other_tip):
    actions.mount_tip(tip, instrument, start=T0, end=T0 + H, actor=member)
    actions.mount_tip(other_tip, instrument, start=T0 + H, actor=member)
    assert queries.tip_mounted(instrument, T0 + H).tip == other_tip
    assert queries.tip_mounted(instrument, T0 + H - timedelta(microseconds=1)).tip == tip
    assert queries.tip_mounted(instrument, T0 - H) is None
    assert [m.tip.name for m in queries.mounts_on(instrument).order_by("start")] == [
        "W-12",
        "PtIr-3",
    ]


def test_ending_a_mount(member, instrument, tip):
    mount = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    with pytest.raises(ValidationError) as too_early:
        actions.unmount_tip(mount, end=T0 - H, actor=member)
    assert "ends after it starts" in messages(too_early)["end"]
    ended = actions.unmount_tip(mount, end=T0 + 4 * H, actor=member)
    assert ended.end == T0 + 4 * H
    assert queries.mount_of(tip, T0 + 5 * H) is None
    with pytest.raises(ValidationError) as again:
        actions.unmount_tip(mount, end=T0 + 6 * H, actor=member)
    assert "already ended" in messages(again)["end"]
    assert [m.pk for m in queries.mounts_of(tip)] == [mount.pk]


def test_a_retired_tip_is_not_mounted(member, instrument, tip):
    tip.retired_at = T0
    tip.save()
    with pytest.raises(ValidationError) as refused:
        actions.mount_tip(tip, instrument, start=T0 + H, actor=member)
    assert "retired" in refused.value.message_dict["tip"][0]


def test_the_database_allows_one_open_mount_per_instrument(member, instrument, tip, other_tip):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    with pytest.raises(IntegrityError), transaction.atomic():
        # Around the actions, as a second request racing the first would.
        TipMount.objects.create(tip=other_tip, instrument=instrument, start=T0 + H)


@pytest.mark.postgres
@pytest.mark.skipif(
    connection.vendor != "postgresql", reason="exclusion constraints need PostgreSQL"
)
def test_postgresql_refuses_overlapping_closed_periods(
    member, instrument, other_instrument, tip, other_tip
):
    actions.mount_tip(tip, instrument, start=T0, end=T0 + 2 * H, actor=member)
    with pytest.raises(IntegrityError), transaction.atomic():
        TipMount.objects.create(tip=other_tip, instrument=instrument, start=T0 + H, end=T0 + 3 * H)
    with pytest.raises(IntegrityError), transaction.atomic():
        TipMount.objects.create(tip=tip, instrument=other_instrument, start=T0 + H, end=T0 + 3 * H)
    # Half-open periods: starting at the instant the other ended is no overlap.
    TipMount.objects.create(tip=other_tip, instrument=instrument, start=T0 + 2 * H)
