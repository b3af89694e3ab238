"""A small history to audit (an invented lab, times in UTC):

T0 - 2 d   sample Cu(111) #5 onto the stage of the test microscope
T0         preparation: anneal (cleans)
T0 + 30 m  tip W-11 mounted
T0 + 1 h   file "a"
T0 + 1.5 h field emission on W-11
T0 + 2 h   file "b"
T0 + 3 h   file "c"
a session of bo from T0 - 1 h to T0 + 6 h; a second tip PtIr-4 exists, never mounted.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from django.test import Client

from labbook.accounts.actions import mint_token
from labbook.datafiles.models import AcquiredFile

T0 = datetime(2026, 4, 6, 9, 0, tzinfo=UTC)
H = timedelta(hours=1)
M = timedelta(minutes=1)


def npy_bytes(seed: int, n: int = 16) -> bytes:
    rng = np.random.default_rng(seed)
    buffer = io.BytesIO()
    np.save(buffer, (rng.standard_normal((n, n)) * 1e-10).astype(np.float32), allow_pickle=False)
    return buffer.getvalue()


@dataclass
class Lab:
    instrument: object
    sample: object
    tip: object
    other_tip: object
    mount: object
    session: object
    preparation: object
    conditioning: object
    files: dict[str, AcquiredFile] = field(default_factory=dict)


@pytest.fixture
def upload_file(member, settings, tmp_path, django_capture_on_commit_callbacks):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    client = Client()

    def send(name: str, at: datetime, instrument, seed: int, **extra) -> AcquiredFile:
        body = {"file": io.BytesIO(npy_bytes(seed))}
        body["file"].name = name
        metadata = {"kind": "topograph", "acquired_at": at.isoformat(), "instrument": instrument.pk}
        body["metadata"] = json.dumps({**metadata, **extra})
        with django_capture_on_commit_callbacks(execute=True):
            response = client.post(
                "/api/v1/files", body, headers={"Authorization": f"Bearer {raw}"}
            )
        assert response.status_code == 201, response.content
        record = AcquiredFile.objects.get(pk=response.json()["id"])
        assert record.status == "ready", record.error
        return record

    return send


@pytest.fixture
def lab(member, instrument, upload_file) -> Lab:
    from labbook.logbook.actions import start_session
    from labbook.samples import actions as samples
    from labbook.tips import actions as tips

    sample = samples.create_sample(name="Cu(111) #5", substrate="Cu(111)", actor=member)
    samples.transfer_sample(
        sample, location="microscope_stage", at=T0 - 48 * H, instrument=instrument, actor=member
    )
    session = start_session(instrument, start=T0 - H, end=T0 + 6 * H, goal="Cu", actor=member)
    preparation = samples.record_preparation(
        sample=sample,
        instrument=instrument,
        started_at=T0,
        steps=[{"kind": "anneal", "temperature_k": 780, "duration_s": 600, "cleans": True}],
        actor=member,
    )
    tip = tips.create_tip(name="W-11", material="W", origin="etched", actor=member)
    other = tips.create_tip(name="PtIr-4", material="PtIr", origin="cut", actor=member)
    mount = tips.mount_tip(tip, instrument, start=T0 + 30 * M, actor=member).mount
    found = Lab(instrument, sample, tip, other, mount, session, preparation, None)
    found.files["a"] = upload_file("a.npy", T0 + H, instrument, 1)
    found.conditioning = tips.record_conditioning(
        tip, kind="field_emission", at=T0 + 90 * M, params={"voltage_v": "60 V"}, actor=member
    )
    found.files["b"] = upload_file("b.npy", T0 + 2 * H, instrument, 2)
    found.files["c"] = upload_file("c.npy", T0 + 3 * H, instrument, 3)
    return found


@pytest.fixture
def member_client(member) -> Client:
    client = Client()
    client.force_login(member)
    return client
