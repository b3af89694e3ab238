"""Every change to a lab record keeps who, when and what (on SQLite and PostgreSQL alike)."""

from __future__ import annotations

import pytest
from django.test import Client

from labbook.core.records import save_record

pytestmark = pytest.mark.django_db


def test_actions_record_the_actor_and_the_change(manager, member, instrument):
    created = instrument.history.get()
    assert created.history_type == "+" and created.history_user == manager

    instrument.description = "after the bake-out"
    save_record(instrument, member)
    newest, oldest = instrument.history.all()[:2]
    assert newest.history_user == member
    delta = newest.diff_against(oldest)
    assert [(c.field, c.old, c.new) for c in delta.changes] == [
        ("description", "test microscope", "after the bake-out")
    ]


def test_changes_through_the_api_name_the_token_user(member, instrument, api_as):
    response = api_as(member).post(
        "/channels",
        {
            "instrument": instrument.pk,
            "name": "LHe level",
            "quantity": "cryogen_level",
            "unit": "%",
        },
    )
    assert response.status_code == 201
    from labbook.instruments.models import Channel

    channel = Channel.objects.get(pk=response.json()["id"])
    assert channel.history.get().history_user == member


def test_changes_through_a_page_session_name_the_user(manager):
    """The history middleware names the logged-in user when a record changes in a request."""
    client = Client()
    client.force_login(manager)
    response = client.post(
        "/api/v1/instruments",
        {"name": "LTM-H"},
        content_type="application/json",
        headers={"X-CSRFToken": "x"},
    )
    # Django's test client skips CSRF checks unless asked to enforce them.
    assert response.status_code == 201
    from labbook.instruments.models import Instrument

    assert Instrument.objects.get(name="LTM-H").history.get().history_user == manager
