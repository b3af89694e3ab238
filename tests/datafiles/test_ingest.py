"""Ingestion end to end in-process: bytes stored under their hash, read, measured, linked."""

from __future__ import annotations

import io
import json
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from django.test import Client

from labbook.accounts.actions import mint_token
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.storage import content_name

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)


def npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=False)
    return buffer.getvalue()


def grating(n: int = 128, amplitude_m: float = 1e-10, periods: int = 8) -> np.ndarray:
    # Even about the image centre, so the plane levelling removes no slope from it (a plain
    # sine has one, and its levelled Sq falls short of A/√2 by ~0.5 % at 8 periods).
    x = (np.arange(n) - (n - 1) / 2) / n
    return np.tile(amplitude_m * np.cos(2 * np.pi * periods * x), (n, 1)).astype(np.float32)


@pytest.fixture
def upload(member, settings, tmp_path, django_capture_on_commit_callbacks):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    client = Client()

    def send(data: bytes, name: str, metadata: dict | None = None):
        body = {"file": io.BytesIO(data)}
        body["file"].name = name
        if metadata is not None:
            body["metadata"] = json.dumps(metadata)
        with django_capture_on_commit_callbacks(execute=True):
            return client.post("/api/v1/files", body, headers={"Authorization": f"Bearer {raw}"})

    return send


def test_a_topograph_is_stored_read_measured_and_thumbnailed(upload, instrument):
    data = npy_bytes(grating())
    metadata = {
        "kind": "topograph",
        "bias_v": "-0.5 V",
        "setpoint_a": "50 pA",
        "scan_size_m": ["20 nm", "20 nm"],
        "acquired_at": T0.isoformat(),
        "instrument": instrument.pk,
    }
    response = upload(data, "grating.npy", metadata)
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.status == "ready", record.error
    assert record.storage_name == content_name(record.sha256)
    assert (record.bias_v, record.setpoint_a) == (-0.5, pytest.approx(5e-11))
    # A sinusoidal grating of amplitude A has Rq = A/√2 and Ra = 2A/π (ISO 25178-2 Sq, Sa;
    # analytic). Sampled at 16 points a period, Ra of the samples is within 0.7 % of 2A/π.
    assert record.stats["rq"] == pytest.approx(1e-10 / 2**0.5, rel=1e-5)
    assert record.stats["ra"] == pytest.approx(2e-10 / np.pi, rel=7e-3)
    assert record.thumbnail_name and record.instrument == instrument
    assert record.acquired_at == T0


def test_the_same_bytes_twice_are_one_dataset(upload):
    data = npy_bytes(grating(64))
    first = upload(data, "a.npy", {"kind": "topograph"})
    second = upload(data, "renamed.npy")
    assert (first.status_code, second.status_code) == (201, 200)
    assert first.json()["id"] == second.json()["id"]
    assert AcquiredFile.objects.count() == 1


def test_any_storage_backend_holds_the_bytes(upload, member, settings):
    # A backend with no files on disk (Django's in-memory storage stands in for an object
    # store): stored, read, measured, served, exported and verified through the storage API.
    import zipfile

    from django.core.files.storage import InMemoryStorage, default_storage
    from django.core.management import call_command

    settings.STORAGES = {
        **settings.STORAGES,
        "default": {"BACKEND": "django.core.files.storage.InMemoryStorage"},
    }
    data = npy_bytes(grating(64))
    first = upload(data, "mem.npy", {"kind": "topograph", "scan_size_m": ["8 nm", "8 nm"]})
    again = upload(data, "mem-again.npy")
    assert (first.status_code, again.status_code) == (201, 200)
    assert isinstance(default_storage._wrapped, InMemoryStorage)
    record = AcquiredFile.objects.get(pk=first.json()["id"])
    assert record.status == "ready", record.error
    assert record.storage_name == content_name(record.sha256)
    with default_storage.open(record.storage_name, "rb") as handle:
        assert handle.read() == data
    _, raw = mint_token(member)
    client = Client(headers={"Authorization": f"Bearer {raw}"})
    download = client.get(f"/api/v1/files/{record.pk}/download")
    assert b"".join(download.streaming_content) == data
    thumbnail = client.get(f"/api/v1/files/{record.pk}/thumbnail.png")
    assert b"".join(thumbnail.streaming_content).startswith(b"\x89PNG\r\n\x1a\n")
    crate = client.get(f"/api/v1/files/{record.pk}/crate.zip")
    assert crate.status_code == 200
    body = b"".join(crate.streaming_content) if crate.streaming else crate.content
    with zipfile.ZipFile(io.BytesIO(body)) as archive:
        assert data in (archive.read(name) for name in archive.namelist())
    out = io.StringIO()
    call_command("verify_files", stdout=out)
    assert "1 files checked: 1 intact, 0 changed, 0 missing" in out.getvalue()


def test_bytes_whose_stored_file_was_lost_come_back_to_their_dataset(upload):
    # New bytes skip the lookup by hash; a dataset whose file went missing is still found, by
    # the unique SHA-256 the INSERT meets, and the upload puts its bytes back.
    from django.core.files.storage import default_storage

    data = npy_bytes(grating(32))
    first = upload(data, "a.npy", {"kind": "topograph"})
    record = AcquiredFile.objects.get(pk=first.json()["id"])
    default_storage.delete(record.storage_name)
    again = upload(data, "again.npy")
    assert (first.status_code, again.status_code) == (201, 200)
    assert again.json()["id"] == record.pk
    assert AcquiredFile.objects.count() == 1
    with default_storage.open(record.storage_name, "rb") as handle:
        assert handle.read() == data


@pytest.mark.parametrize(
    ("data", "name", "expected"),
    [
        (b"", "empty.npy", "empty"),
        (b"\x93NUMPY\x01\x00v\x00{'descr'", "cut.npy", ""),
        (b"this is not a data file", "notes.xyz", "unknown"),
    ],
)
def test_a_file_that_cannot_be_read_keeps_its_bytes_and_its_error(upload, data, name, expected):
    response = upload(data, name)
    assert response.status_code == 201
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.status == "unreadable" and record.error
    assert expected in record.error.lower()
    from labbook.datafiles.storage import read_stored

    assert read_stored(record.storage_name) == data


def test_an_upload_name_cannot_choose_where_the_bytes_land(upload):
    response = upload(npy_bytes(grating(32)), "../../../etc/passwd")
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.original_name == "passwd"
    assert record.storage_name == content_name(record.sha256)


def test_lineage_is_resolved_from_the_records(upload, member, manager, instrument):
    from labbook.samples import actions as samples
    from labbook.tips import actions as tips

    crystal = samples.create_sample(name="Cu(111) #9", substrate="Cu(111)", actor=member)
    samples.record_preparation(
        sample=crystal,
        instrument=instrument,
        started_at=T0 - timedelta(hours=3),
        actor=member,
        steps=[
            {"kind": "anneal", "temperature_k": 780, "duration_s": 600, "cleans": True},
            {"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.25, "duration_s": 240},
        ],
    )
    samples.transfer_sample(
        crystal,
        location="microscope_stage",
        at=T0 - timedelta(hours=2),
        instrument=instrument,
        actor=member,
    )
    tip = tips.create_tip(name="W-21", material="W", origin="etched", actor=member)
    tips.mount_tip(tip, instrument=instrument, start=T0 - timedelta(days=1), actor=member)
    response = upload(
        npy_bytes(grating(32)),
        "islands.npy",
        {"kind": "topograph", "acquired_at": T0.isoformat(), "instrument": instrument.pk},
    )
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert (record.sample, record.tip) == (crystal, tip)
    assert record.coverage_ml == pytest.approx(1.0)
    assert [(c.material, c.coverage_ml) for c in record.coverages.all()] == [
        ("NaCl", pytest.approx(1.0))
    ]
    assert record.lineage["surface_state"]["coverages"][0]["material"] == "NaCl"


def test_search_by_bias_setpoint_coverage_and_kind(upload, member, instrument):
    from labbook.datafiles.actions import replace_coverages

    made = []
    for index, (bias, coverage) in enumerate([(-0.5, 0.1), (0.2, 0.5), (1.0, 0.5), (0.3, 2.0)]):
        response = upload(
            npy_bytes(grating(16, periods=index + 1)),
            f"f{index}.npy",
            {
                "kind": "topograph",
                "bias_v": bias,
                "setpoint_a": 1e-10 * (index + 1),
                "acquired_at": (T0 + timedelta(minutes=index)).isoformat(),
            },
        )
        record = AcquiredFile.objects.get(pk=response.json()["id"])
        record.coverage_ml = coverage
        record.save()
        replace_coverages(
            record, [{"material": "C60" if index % 2 else "NaCl", "coverage_ml": coverage}]
        )
        made.append(record.pk)
    _, raw = mint_token(member)
    client = Client()

    def ids(**params):
        response = client.get("/api/v1/files", params, headers={"Authorization": f"Bearer {raw}"})
        assert response.status_code == 200, response.content
        return [item["id"] for item in response.json()["items"]]

    assert ids() == made[::-1]  # newest first
    assert ids(bias_min=0.1, bias_max=0.5) == [made[3], made[1]]
    assert ids(bias_min=0, coverage_min=0.4, coverage_max=0.6) == [made[2], made[1]]
    assert ids(adsorbate="C60", coverage_min=1) == [made[3]]
    assert ids(setpoint_min=2.5e-10) == [made[3], made[2]]
    assert ids(kind="spectrum") == []
    page = client.get(
        "/api/v1/files", {"limit": 3}, headers={"Authorization": f"Bearer {raw}"}
    ).json()
    assert len(page["items"]) == 3 and page["next_offset"] == 3


def test_thumbnail_and_download_need_login(upload, member):
    response = upload(npy_bytes(grating(64)), "g.npy", {"kind": "topograph"})
    file_id = response.json()["id"]
    anonymous = Client()
    assert anonymous.get(f"/api/v1/files/{file_id}/thumbnail.png").status_code == 401
    _, raw = mint_token(member)
    headers = {"Authorization": f"Bearer {raw}"}
    thumb = Client().get(f"/api/v1/files/{file_id}/thumbnail.png", headers=headers)
    assert thumb.status_code == 200 and thumb["Content-Type"] == "image/png"
    from PIL import Image

    picture = Image.open(io.BytesIO(b"".join(thumb.streaming_content)))
    assert max(picture.size) == 256
    download = Client().get(f"/api/v1/files/{file_id}/download", headers=headers)
    assert b"".join(download.streaming_content) == npy_bytes(grating(64))


def test_read_only_token_cannot_upload(member, settings, tmp_path):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member, read_only=True)
    body = {"file": io.BytesIO(b"x")}
    body["file"].name = "x.npy"
    response = Client().post("/api/v1/files", body, headers={"Authorization": f"Bearer {raw}"})
    assert response.status_code == 403
    assert not AcquiredFile.objects.exists()


def test_a_tip_lists_the_datasets_it_produced(upload, member, instrument):
    from labbook.tips import actions as tips

    tip = tips.create_tip(name="PtIr-3", material="PtIr", origin="cut", actor=member)
    tips.mount_tip(tip, instrument=instrument, start=T0 - timedelta(hours=1), actor=member)
    taken = upload(
        npy_bytes(grating(16)),
        "t.npy",
        {"kind": "topograph", "acquired_at": T0.isoformat(), "instrument": instrument.pk},
    )
    upload(
        npy_bytes(grating(16, periods=3)),
        "before.npy",
        {
            "kind": "topograph",
            "acquired_at": (T0 - timedelta(days=2)).isoformat(),
            "instrument": instrument.pk,
        },
    )
    _, raw = mint_token(member)
    body = (
        Client()
        .get(f"/api/v1/tips/{tip.pk}/files", headers={"Authorization": f"Bearer {raw}"})
        .json()
    )
    assert [item["id"] for item in body["items"]] == [taken.json()["id"]]
    assert body["items"][0]["instrument"] == instrument.pk


def test_ingest_command_takes_files_and_folders_once(
    member, instrument, settings, tmp_path, django_capture_on_commit_callbacks
):
    from io import StringIO

    from django.core.management import call_command

    settings.MEDIA_ROOT = str(tmp_path / "files")
    folder = tmp_path / "run-42"
    (folder / "sub").mkdir(parents=True)
    (folder / "a.npy").write_bytes(npy_bytes(grating(16)))
    (folder / "sub" / "b.npy").write_bytes(npy_bytes(grating(16, periods=2)))
    (folder / "sub" / "b.npy.json").write_text(json.dumps({"kind": "topograph", "bias_v": "0.1 V"}))
    out = StringIO()
    with django_capture_on_commit_callbacks(execute=True):
        call_command(
            "ingest",
            str(folder),
            "--user",
            member.username,
            "--instrument",
            instrument.name,
            stdout=out,
        )
    assert "2 new, 0 already stored, 0 failed" in out.getvalue()
    b = AcquiredFile.objects.get(original_name="b.npy")
    assert b.given_metadata == {"kind": "topograph", "bias_v": "0.1 V"}, b.error
    assert b.bias_v == pytest.approx(0.1) and b.instrument == instrument and b.source == "ingest"
    again = StringIO()
    call_command("ingest", str(folder), "--user", member.username, stdout=again)
    assert "0 new, 2 already stored" in again.getvalue()


def test_the_watcher_waits_for_complete_files_and_survives_a_restart(
    member, instrument, settings, tmp_path
):
    from labbook.datafiles.folders import FolderWatch

    settings.MEDIA_ROOT = str(tmp_path / "files")
    folder = tmp_path / "incoming"
    folder.mkdir()
    growing = folder / "scan.npy"
    growing.write_bytes(npy_bytes(grating(16))[:40])  # still being written
    watch = FolderWatch(folder, actor=member, instrument=instrument, settle_s=5)
    assert watch.scan(now=0).created == []
    growing.write_bytes(npy_bytes(grating(16)))  # finished: size changed, settling starts again
    assert watch.scan(now=3).created == []
    assert watch.scan(now=6).created == []  # changed at t=3, not settled until t=8
    taken = watch.scan(now=9).created
    assert [p.name for p, _, _ in taken] == ["scan.npy"]
    # Down for a while: a file arrives; a new watcher (restart) takes it and not the old one.
    (folder / "later.npy").write_bytes(npy_bytes(grating(16, periods=5)))
    restarted = FolderWatch(folder, actor=member, instrument=instrument, settle_s=0)
    assert [p.name for p, _, _ in restarted.scan(now=100).created] == ["later.npy"]
    assert restarted.scan(now=200).created == [] and AcquiredFile.objects.count() == 2


def test_a_processing_failure_is_recorded_on_the_row(upload, monkeypatch):
    from labbook.datafiles import processing, tasks

    def broken(parsed, given):
        raise RuntimeError("the statistics module fell over")

    monkeypatch.setattr(processing, "analyse", broken)
    response = upload(npy_bytes(grating(16)), "x.npy", {"kind": "topograph"})
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.status == "pending" and record.attempts == 1
    assert record.error == "processing failed: RuntimeError: the statistics module fell over"
    for _ in range(tasks.MAX_ATTEMPTS - 1):
        tasks.process_file.apply(args=[record.pk])
    record.refresh_from_db()
    assert record.status == "unreadable" and record.attempts == tasks.MAX_ATTEMPTS


def test_verify_files_reports_changed_and_missing_bytes_and_deletes_nothing(
    upload, manager, settings
):
    from io import StringIO

    from django.core import mail
    from django.core.files.storage import default_storage
    from django.core.management import call_command
    from django.core.management.base import CommandError

    from labbook.datafiles.tasks import verify_stored_files

    manager.email = "mara@example.org"
    manager.save()
    ids = [upload(npy_bytes(grating(16, periods=p)), f"v{p}.npy").json()["id"] for p in (1, 2, 3)]
    out = StringIO()
    call_command("verify_files", stdout=out)
    assert "3 files checked: 3 intact, 0 changed, 0 missing" in out.getvalue()

    changed, missing = AcquiredFile.objects.get(pk=ids[0]), AcquiredFile.objects.get(pk=ids[1])
    with default_storage.open(changed.storage_name, "wb") as handle:
        handle.write(b"bit rot")
    default_storage.delete(missing.storage_name)
    out, err = StringIO(), StringIO()
    with pytest.raises(CommandError, match="2 stored file"):
        call_command("verify_files", stdout=out, stderr=err)
    assert "1 intact, 1 changed, 1 missing" in out.getvalue()
    assert (
        f"changed  #{changed.pk}" in err.getvalue() and f"missing  #{missing.pk}" in err.getvalue()
    )
    assert AcquiredFile.objects.count() == 3  # nothing deleted
    assert verify_stored_files.apply().get() == {"checked": 3, "changed": 1, "missing": 1}
    assert mail.outbox and mail.outbox[0].to == ["mara@example.org"]


def test_an_oversized_file_from_the_ingest_command_is_kept_unreadable(
    member, settings, tmp_path, django_capture_on_commit_callbacks
):
    import hashlib
    import os
    from io import StringIO

    from django.core.files.storage import default_storage
    from django.core.management import call_command

    settings.MEDIA_ROOT = str(tmp_path / "files")
    # The reader limit lowered to 1 MiB, so a sparse 3 MiB file stands for one over 2 GiB.
    settings.LABBOOK_MAX_UPLOAD_BYTES = 1 << 20
    folder = tmp_path / "big"
    folder.mkdir()
    big = folder / "huge.h5"
    with big.open("wb") as handle:
        handle.truncate(3 << 20)  # a hole: no blocks written (as `truncate -s 3M`)
        handle.seek((3 << 20) - 4)
        handle.write(b"tail")
    expected = hashlib.sha256(big.read_bytes()).hexdigest()  # hashlib over the same bytes
    out = StringIO()
    with django_capture_on_commit_callbacks(execute=True) as queued:
        call_command("ingest", str(folder), "--user", member.username, stdout=out)
    assert "1 new, 0 already stored, 0 failed" in out.getvalue()
    assert queued == []  # never handed to a reader
    record = AcquiredFile.objects.get()
    assert record.status == "unreadable" and record.size_bytes == 3 << 20
    assert record.error.startswith("larger than the reader limit of 1,048,576 bytes")
    assert "3,145,728" in record.error
    assert record.sha256 == expected and record.storage_name == content_name(expected)
    with default_storage.open(record.storage_name, "rb") as stored:
        assert hashlib.sha256(stored.read()).hexdigest() == expected  # the bytes are kept
    assert not os.listdir(tmp_path / "files" / "incoming")  # no spool left behind


def test_an_upload_over_the_cap_is_refused_and_nothing_is_kept(upload, settings, tmp_path):
    import os

    settings.LABBOOK_MAX_UPLOAD_BYTES = 1 << 10
    response = upload(b"\0" * (2 << 10), "big.npy")
    assert response.status_code == 413
    assert AcquiredFile.objects.count() == 0
    stored = tmp_path / "files" / "acquired"
    assert not stored.exists() or not any(stored.rglob("*"))
    assert not os.listdir(tmp_path / "files" / "incoming")
