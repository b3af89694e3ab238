"""Pages need a login, and a login of a lab member."""

from __future__ import annotations

import pytest
from django.test import Client

pytestmark = pytest.mark.django_db


def test_anonymous_is_sent_to_the_login_page():
    response = Client().get("/")
    assert response.status_code == 302
    assert response["Location"] == "/login/?next=/"


def test_login_page_is_open_and_logs_in(member):
    client = Client()
    page = client.get("/login/")
    assert page.status_code == 200 and b'name="password"' in page.content
    response = client.post("/login/", {"username": "bo", "password": "bo-pw-Lattice-7"})
    assert response.status_code == 302 and response["Location"] == "/"
    assert client.get("/").status_code == 200


def test_wrong_password_is_refused(member):
    response = Client().post("/login/", {"username": "bo", "password": "guess"})
    assert response.status_code == 200
    assert b"do not match" in response.content


def test_outsider_is_forbidden(outsider):
    client = Client()
    client.force_login(outsider)
    assert client.get("/").status_code == 403


def test_member_sees_the_dashboard_with_instruments(member, instrument):
    client = Client()
    client.force_login(member)
    response = client.get("/")
    assert response.status_code == 200
    assert b"LTM-T" in response.content


def test_instrument_text_is_escaped_on_the_dashboard(manager, member):
    from labbook.instruments.actions import create_instrument

    create_instrument(name="<script>alert(1)</script>", description="<b>bold</b>", actor=manager)
    client = Client()
    client.force_login(member)
    content = client.get("/").content
    assert b"<script>alert(1)</script>" not in content
    assert b"&lt;script&gt;alert(1)&lt;/script&gt;" in content


def test_setup_pages_are_for_staff_only(member):
    client = Client()
    client.force_login(member)
    response = client.get("/admin/")
    assert response.status_code == 302 and "/admin/login/" in response["Location"]


def test_logout_is_a_post(member):
    client = Client()
    client.force_login(member)
    assert client.get("/logout/").status_code == 405
    assert client.post("/logout/").status_code == 302
    assert client.get("/").status_code == 302


def test_managers_reach_the_setup_pages_without_delete_rights_on_records(manager):
    client = Client()
    client.force_login(manager)
    assert client.get("/admin/").status_code == 200
    assert client.get("/admin/instruments/instrument/").status_code == 200
    assert manager.has_perm("instruments.change_instrument")
    assert not manager.has_perm("instruments.delete_instrument")  # retired, never deleted
