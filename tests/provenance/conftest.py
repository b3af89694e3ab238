"""A history to trace datasets through (an invented lab, times in UTC):

day before  09:00  preparation 0: 0.5 ML Ag                      (before the cleaning)
            10:00  file "before-cleaning"
T0 = 09:00  preparation 1: sputter + anneal (cleans)
     09:30  tip W-7 mounted
     09:50  reading 1.0e-10 mbar
     10:00  file "clean"
     11:00  preparation 2: 0.4 ML NaCl (0.1 ML/min × 4 min)
     11:30  field emission on W-7
     11:50  reading 2.0e-10 mbar
     12:00  file "nacl"   and   file "nacl-2" (12:10)
     13:00  preparation 3: CO dose, 1e-6 mbar × 100 s (100 L at the gauge)
     13:30  CO picked up by W-7
     13:55  reading 3.0e-10 mbar
     14:00  file "co"
a session of bo on the instrument from 08:00 to 15:00.
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

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
H = timedelta(hours=1)
M = timedelta(minutes=1)

SPUTTER = {
    "kind": "sputter",
    "gas": "Ar",
    "energy_ev": "1 keV",
    "current_a": "1 uA",
    "beam_area_cm2": 1,
    "duration_s": "10 min",
    "pressure_mbar": "5e-6 mbar",
}
ANNEAL = {
    "kind": "anneal",
    "temperature_k": "800 K",
    "duration_s": "15 min",
    "method": "resistive",
    "cleans": True,
}
AG = {"kind": "deposit", "material": "Ag", "rate_ml_per_min": 0.1, "duration_s": "5 min"}
NACL = {"kind": "deposit", "material": "NaCl", "rate_ml_per_min": 0.1, "duration_s": "4 min"}
CO_DOSE = {"kind": "dose", "gas": "CO", "pressure_mbar": 1e-6, "duration_s": 100}


def npy_bytes(seed: int, n: int = 32) -> bytes:
    rng = np.random.default_rng(seed)
    buffer = io.BytesIO()
    np.save(buffer, (rng.standard_normal((n, n)) * 1e-10).astype(np.float32), allow_pickle=False)
    return buffer.getvalue()


@dataclass
class History:
    instrument: object
    sample: object
    tip: object
    channel: object
    session: object
    preparations: list = field(default_factory=list)
    mount: object = None
    conditioning: list = field(default_factory=list)
    files: dict[str, AcquiredFile] = field(default_factory=dict)


@pytest.fixture
def media(settings, tmp_path):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    return tmp_path


@pytest.fixture
def upload_file(member, media, django_capture_on_commit_callbacks):
    _, raw = mint_token(member)
    client = Client()

    def send(name: str, at: datetime, instrument, seed: int) -> AcquiredFile:
        body = {"file": io.BytesIO(npy_bytes(seed))}
        body["file"].name = name
        body["metadata"] = json.dumps(
            {
                "kind": "topograph",
                "acquired_at": at.isoformat(),
                "instrument": instrument.pk,
                "scan_size_m": ["10 nm", "10 nm"],
                "bias_v": "-0.1 V",
                "setpoint_a": "20 pA",
            }
        )
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
def history(member, instrument, upload_file) -> History:
    from labbook.instruments.actions import create_channel
    from labbook.instruments.readings import insert_readings
    from labbook.logbook.actions import start_session
    from labbook.samples import actions as samples
    from labbook.tips import actions as tips

    sample = samples.create_sample(name="Cu(111) #3", substrate="Cu(111)", actor=member)
    samples.transfer_sample(
        sample,
        location="microscope_stage",
        at=T0 - 2 * 24 * H,
        instrument=instrument,
        actor=member,
    )
    channel = create_channel(
        instrument,
        name="STM pressure",
        quantity="pressure",
        unit="mbar",
        expected_interval_s=600,
        actor=member,
    )
    session = start_session(instrument, start=T0 - H, end=T0 + 6 * H, goal="NaCl", actor=member)
    tip = tips.create_tip(name="W-7", material="W", origin="etched", actor=member)
    found = History(instrument, sample, tip, channel, session)

    def prepare(at, steps):
        found.preparations.append(
            samples.record_preparation(
                sample=sample, instrument=instrument, started_at=at, steps=steps, actor=member
            )
        )

    prepare(T0 - 24 * H, [AG])
    found.files["before-cleaning"] = upload_file("before.npy", T0 - 23 * H, instrument, 1)
    prepare(T0, [SPUTTER, ANNEAL])
    found.mount = tips.mount_tip(tip, instrument, start=T0 + 30 * M, actor=member).mount
    insert_readings(
        [
            (channel.pk, T0 + 50 * M, 1.0e-10),
            (channel.pk, T0 + 2 * H + 50 * M, 2.0e-10),
            (channel.pk, T0 + 4 * H + 55 * M, 3.0e-10),
        ]
    )
    found.files["clean"] = upload_file("clean.npy", T0 + H, instrument, 2)
    prepare(T0 + 2 * H, [NACL])
    found.conditioning.append(
        tips.record_conditioning(
            tip,
            kind="field_emission",
            at=T0 + 2 * H + 30 * M,
            params={"voltage_v": "60 V", "current_a": "1 uA"},
            actor=member,
        )
    )
    found.files["nacl"] = upload_file("nacl.npy", T0 + 3 * H, instrument, 3)
    found.files["nacl-2"] = upload_file("nacl-2.npy", T0 + 3 * H + 10 * M, instrument, 4)
    prepare(T0 + 4 * H, [CO_DOSE])
    found.conditioning.append(
        tips.record_conditioning(
            tip,
            kind="functionalisation",
            at=T0 + 4 * H + 30 * M,
            params={"species": "CO"},
            actor=member,
        )
    )
    found.files["co"] = upload_file("co.npy", T0 + 5 * H, instrument, 5)
    return found
