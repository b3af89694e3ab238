"""Fault: the files volume is full (ENOSPC) when an upload arrives.

Simulated where a real full disk fails: while the upload is spooled to ``incoming/``, or while
the storage writes it under its hash (after part of the bytes, as a real disk fills). The
answer must say the disk is full, the database must be unchanged (no dataset without its
bytes, no job), and once space is freed the same upload must store the whole file.
"""

from __future__ import annotations

import errno
import hashlib
import tempfile

import pytest
from django.core.files import File
from django.core.files.storage import default_storage
from django.test import Client

from labbook.accounts.actions import mint_token
from labbook.core.models import Job
from labbook.datafiles import storage
from labbook.datafiles.models import AcquiredFile

from .conftest import topograph

pytestmark = pytest.mark.django_db
_NAMED_TEMPORARY_FILE = tempfile.NamedTemporaryFile  # the real one, before a test patches it


def _full() -> OSError:
    return OSError(errno.ENOSPC, "No space left on device")


class _FullSpool:
    """A spool file on a volume that fills after the first write."""

    def __init__(self, **kwargs):
        self._file = _NAMED_TEMPORARY_FILE(**kwargs)
        self.name = self._file.name
        self._writes = 0

    def write(self, data: bytes) -> int:
        self._writes += 1
        if self._writes > 1 or len(data) > 1024:
            self._file.write(data[:1024])
            raise _full()
        return self._file.write(data)

    def close(self) -> None:
        self._file.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self._file.close()


def _chunks_until_full(self, chunk_size=None):
    """File.chunks on a volume with room for half the file: the storage writes the first
    half, then the disk is full. Django's own FileSystemStorage._save runs on it, so what
    it leaves on disk is what a real full disk leaves."""
    self.seek(0)
    data = self.read()
    yield data[: len(data) // 2]
    raise _full()


@pytest.fixture(autouse=True)
def _own_volume(settings, tmp_path):
    """A volume of the test's own: a partial file left by an earlier run must not count."""
    settings.MEDIA_ROOT = tmp_path / "files"


@pytest.fixture(params=["spool", "store"])
def full_disk(request, monkeypatch):
    if request.param == "spool":
        monkeypatch.setattr(storage.tempfile, "NamedTemporaryFile", _FullSpool)
    else:
        monkeypatch.setattr(File, "chunks", _chunks_until_full)
    monkeypatch.where = request.param
    return monkeypatch


def _post(member, upload):
    _, token = mint_token(member)
    client = Client(raise_request_exception=False)
    return client.post(
        "/api/v1/files",
        {"file": upload, "metadata": '{"kind": "topograph"}'},
        headers={"Authorization": f"Bearer {token}"},
    )


def _stored_names() -> set[str]:
    root = storage.settings.MEDIA_ROOT
    return {str(p.relative_to(root)) for p in root.rglob("*") if p.is_file()}


def test_a_full_disk_leaves_the_database_unchanged(full_disk, member, fault_report):
    upload = topograph(11)
    sha256 = hashlib.sha256(upload.getvalue()).hexdigest()
    files_before, jobs_before = AcquiredFile.objects.count(), Job.objects.count()
    incoming_before = {n for n in _stored_names() if n.startswith("incoming/")}

    response = _post(member, upload)

    unchanged = (
        AcquiredFile.objects.count() == files_before
        and Job.objects.count() == jobs_before
        and not AcquiredFile.objects.filter(sha256=sha256).exists()
    )
    whole = response.status_code == 201 and (
        storage.verify_stored(AcquiredFile.objects.get(sha256=sha256).storage_name, sha256) == "ok"
    )
    fault_report(
        f"files volume full ({full_disk.where})",
        tries=1,
        survived=int((unchanged and response.status_code >= 500) or whole),
        lost=int(not (unchanged or whole)),
        note=f"answer {response.status_code}",
    )
    # Refused with nothing recorded, or (a storage that moves the spool into place never
    # writes under the content name) stored whole: never a dataset without all its bytes.
    if response.status_code != 201:
        assert response.status_code >= 500, response.content
        assert unchanged, "a dataset row or job was written without its bytes"
    else:
        assert whole, "a dataset was recorded with bytes cut short by the full disk"
    # The spool is cleaned up whatever happened.
    assert {n for n in _stored_names() if n.startswith("incoming/")} == incoming_before


def test_a_full_disk_is_answered_507_naming_the_full_volume(monkeypatch, member):
    monkeypatch.setattr(storage.tempfile, "NamedTemporaryFile", _FullSpool)
    response = _post(member, topograph(12))
    assert response.status_code == 507, response.status_code
    assert "full" in response.json()["detail"]


def test_bytes_cut_short_by_a_full_disk_are_never_taken_for_the_file(monkeypatch, member):
    """Django's FileSystemStorage, writing a stream, leaves the bytes it wrote before ENOSPC
    under the content name; a later upload of the same bytes must not take them for the
    file. store_stream offers the spool as a file to move (one rename), so nothing partial
    ever lands under that name."""
    monkeypatch.setattr(File, "chunks", _chunks_until_full)
    upload = topograph(13)
    data = upload.getvalue()
    sha256 = hashlib.sha256(data).hexdigest()
    first = _post(member, upload)  # refused, or (a storage that moves files) stored whole

    monkeypatch.undo()  # space is freed; the instrument PC sends the same file again
    response = _post(member, topograph(13))
    assert response.status_code == (200 if first.status_code == 201 else 201), response.content
    record = AcquiredFile.objects.get(sha256=sha256)
    assert storage.verify_stored(record.storage_name, sha256) == "ok"
    assert default_storage.size(record.storage_name) == len(data)


def test_after_the_disk_is_freed_the_same_upload_is_stored_whole(
    monkeypatch, member, django_capture_on_commit_callbacks
):
    """The spool failure leaves nothing behind, so the retry stores and processes the file."""
    monkeypatch.setattr(storage.tempfile, "NamedTemporaryFile", _FullSpool)
    upload = topograph(14)
    data = upload.getvalue()
    sha256 = hashlib.sha256(data).hexdigest()
    assert _post(member, upload).status_code >= 500
    monkeypatch.undo()

    with django_capture_on_commit_callbacks(execute=True):
        response = _post(member, topograph(14))
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(sha256=sha256)
    assert storage.verify_stored(record.storage_name, sha256) == "ok"
    record.refresh_from_db()
    assert record.status == "ready", record.error  # processed in-process (eager tasks)
