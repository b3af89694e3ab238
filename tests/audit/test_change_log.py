"""The lab-wide change log at /changes/: newest first, filterable by user, record type and
time, in keyset pages with shareable URLs, in a bounded number of queries."""

from __future__ import annotations

import re
from datetime import timedelta

import pytest
from django.test import Client
from django.utils import timezone

from labbook.core.records import save_record
from labbook.provenance.audit import ChangeFilter, Cursor, change_page

pytestmark = pytest.mark.django_db


def _all_rows() -> list[tuple[str, int]]:
    from labbook.provenance.audit import RECORD_TYPES, _history_model

    rows = []
    for t in RECORD_TYPES:
        for at, hid in _history_model(t.model).objects.values_list("history_date", "history_id"):
            rows.append((at, t.key, hid))
    rows.sort(reverse=True)
    return [(key, hid) for _, key, hid in rows]


def test_pages_walk_every_history_row_once_newest_first(lab, manager):
    for index in range(7):
        lab.tip.notes = f"note {index}"
        save_record(lab.tip, manager)
    expected = _all_rows()
    seen, after = [], None
    while True:
        page = change_page(ChangeFilter(), after=after, limit=9)
        seen += [(e.type_key, e.history_id) for e in page.entries]
        if page.next_cursor is None:
            break
        after = Cursor.decode(page.next_cursor.encode())
    assert seen == expected
    assert len(seen) > 20  # the fixture made rows of many types


def test_filters_by_user_type_and_time(lab, manager, member):
    lab.sample.notes = "by the manager"
    save_record(lab.sample, manager)
    by_manager = change_page(ChangeFilter(user=manager.pk)).entries
    assert by_manager and all(e.user == manager for e in by_manager)
    assert "sample" in {e.type_key for e in by_manager}
    only_tips = change_page(ChangeFilter(types=("tip", "mount"))).entries
    assert {e.type_key for e in only_tips} == {"tip", "mount"}
    future = change_page(ChangeFilter(since=timezone.now() + timedelta(days=1))).entries
    assert future == []
    one = change_page(ChangeFilter(types=("sample",), record=lab.sample.pk)).entries
    assert [e.action for e in one] == ["changed", "created"]


def test_page_is_bounded_in_queries_whatever_the_number_of_rows(
    lab, manager, django_assert_max_num_queries
):
    for index in range(60):
        lab.tip.notes = f"n{index}"
        save_record(lab.tip, manager)
    # one union + per type on the page (rows, predecessors) + linked names + users
    with django_assert_max_num_queries(45):
        page = change_page(ChangeFilter(), limit=50)
    assert len(page.entries) == 50 and page.next_cursor is not None


def test_the_page_has_a_get_form_shareable_urls_and_links(lab, manager, member_client):
    lab.tip.notes = "<img src=x onerror=alert(1)>"
    save_record(lab.tip, manager)
    response = member_client.get("/changes/", {"type": "tip", "user": manager.pk})
    assert response.status_code == 200
    body = response.content.decode()
    assert '<form method="get"' in body
    assert f'href="/tips/{lab.tip.pk}/"' in body
    assert "<img src=x" not in body and "&lt;img src=x onerror=alert(1)&gt;" in body
    assert "Mara Quell" in body


def test_next_page_link_keeps_the_filters(lab, manager, member_client):
    for index in range(60):
        lab.tip.notes = f"n{index}"
        save_record(lab.tip, manager)
    body = member_client.get("/changes/", {"type": "tip"}).content.decode()
    link = re.search(r'href="(\?[^"]*after=[^"]*)"', body).group(1).replace("&amp;", "&")
    assert "type=tip" in link
    second = member_client.get("/changes/" + link)
    assert second.status_code == 200 and "Newest" in second.content.decode()


@pytest.mark.parametrize(
    ("params", "message"),
    [
        ({"type": "nonsense"}, "no such record type"),
        ({"since": "yesterday"}, "since: give a date"),
        ({"after": "garbage"}, "after: not a page position"),
        ({"record": "3"}, "exactly one record type"),
    ],
)
def test_bad_filters_are_named(lab, member_client, params, message):
    response = member_client.get("/changes/", params)
    assert response.status_code == 400
    assert message in response.content.decode()


def test_the_log_needs_a_lab_member(lab, outsider):
    assert Client().get("/changes/").status_code == 302
    client = Client()
    client.force_login(outsider)
    assert client.get("/changes/").status_code == 403


def test_every_record_type_reads_including_recipe_versions(lab, member, member_client):
    from labbook.samples.actions import create_recipe, revise_recipe

    steps = [{"kind": "anneal", "temperature_k": 780, "duration_s": 600, "cleans": True}]
    first = create_recipe(name="Cu(111) clean", steps=steps, actor=member)
    revise_recipe(first, steps=[{**steps[0], "temperature_k": 800}], actor=member)
    entries = change_page(ChangeFilter(types=("recipe",))).entries
    assert len(entries) >= 2 and {e.type_key for e in entries} == {"recipe"}
    for record_type in ("recipe", "step", "transfer", "session", "conditioning", "dataset"):
        response = member_client.get("/changes/", {"type": record_type})
        assert response.status_code == 200, record_type
