"""The integrity page: the latest re-hash of the stored files, what changed, what is missing."""

from __future__ import annotations

import pytest
from django.core.files.storage import default_storage
from django.test import Client

from labbook.datafiles.integrity import latest_report, verify_all
from labbook.datafiles.models import AcquiredFile
from tests.datafiles.test_ingest import grating, npy_bytes, upload  # noqa: F401 - a fixture

pytestmark = pytest.mark.django_db


def _page(user) -> str:
    client = Client()
    client.force_login(user)
    response = client.get("/datasets/integrity/")
    assert response.status_code == 200
    return response.content.decode()


def test_before_any_check_the_page_says_so(member, settings, tmp_path):
    settings.DATA_DIR = tmp_path
    assert latest_report() is None
    assert "No check has run yet" in _page(member)


def test_the_page_names_the_changed_and_missing_files_of_the_latest_check(
    upload, member, settings, tmp_path  # noqa: F811 - the fixture
):
    settings.DATA_DIR = tmp_path
    ids = [upload(npy_bytes(grating(16, periods=p)), f"w{p}.npy").json()["id"] for p in (1, 2, 3)]
    verify_all()
    text = _page(member)
    assert "3 files, 3 unchanged" in text and "Every stored file matches" in text

    changed, missing = AcquiredFile.objects.get(pk=ids[0]), AcquiredFile.objects.get(pk=ids[1])
    with default_storage.open(changed.storage_name, "wb") as handle:
        handle.write(b"bit rot")
    default_storage.delete(missing.storage_name)
    report = verify_all()
    assert len(report.problems) == 2
    text = _page(member)
    assert "2 changed or missing" in text
    assert f'href="/datasets/{changed.pk}/"' in text and "w1.npy" in text
    assert f'href="/datasets/{missing.pk}/"' in text and "w2.npy" in text
    assert changed.sha256 in text
    assert AcquiredFile.objects.count() == 3  # nothing deleted


def test_outsiders_do_not_see_it(outsider):
    client = Client()
    client.force_login(outsider)
    assert client.get("/datasets/integrity/").status_code == 403
