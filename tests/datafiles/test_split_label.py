"""Column heads split into name and unit: "quantity / unit" and "quantity (unit)" as before, but
a derivative's slash ("dI/dV", "d2I/dV2") is part of the name. A text spectrum with a "dI/dV"
column is ingested end to end and its lock-in channel found."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from django.test import Client

from labbook.accounts.actions import mint_token
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.readers import read_file
from labbook.datafiles.readers.normalise import normalise_key, snake, split_label


@pytest.mark.parametrize(
    ("label", "expected"),
    [
        # quantity / unit, the physicist's column head (ISO 80000-1), still a unit
        ("Bias/V", ("Bias", "V")),
        ("Current / A", ("Current", "A")),
        ("Z/nm", ("Z", "nm")),
        ("Bias/mV", ("Bias", "mV")),
        ("depth/dm", ("depth", "dm")),  # a d-prefixed unit is not a derivative
        # brackets
        ("Bias (V)", ("Bias", "V")),
        ("# tip bias [mV]", ("tip bias", "mV")),
        ("LockIn X (V)", ("LockIn X", "V")),
        # derivatives: the slash belongs to the name
        ("dI/dV", ("dI/dV", None)),
        ("d2I/dV2", ("d2I/dV2", None)),
        ("d²I/dV²", ("d²I/dV²", None)),
        ("d^2I/dV^2", ("d^2I/dV^2", None)),
        ("dZ / dV", ("dZ / dV", None)),
        ("LockIn dI/dV", ("LockIn dI/dV", None)),
        # ... and a unit after a derivative is read
        ("dI/dV (a.u.)", ("dI/dV", "a.u.")),
        ("dI/dV [nS]", ("dI/dV", "nS")),
        ("dI/dV/(A/V)", ("dI/dV", "A/V")),
        ("dI/dV / nS", ("dI/dV", "nS")),
        ("dI/dV/nS", ("dI/dV", "nS")),
        ("dZ/dV [nm/V]", ("dZ/dV", "nm/V")),
        # a ratio of bracketed quantities has no unit; a bare I/V stays "I in volts"
        ("(dI/dV)/(I/V)", ("(dI/dV)/(I/V)", None)),
        ("I/V", ("I", "V")),
        ("column1", ("column1", None)),
    ],
)
def test_split_label_with_slash_units(label, expected):
    assert split_label(label, slash_unit=True) == expected


def test_without_slash_units_only_brackets_give_a_unit():
    assert split_label("Bias/V") == ("Bias/V", None)
    assert split_label("dI/dV") == ("dI/dV", None)
    assert split_label("dI/dV (a.u.)") == ("dI/dV", "a.u.")
    assert normalise_key("Lock-in/Amplitude (mV)") == ("lockin/amplitude", "mV")


def test_a_derivative_head_becomes_the_lock_in_name_processing_knows():
    # processing._LOCKIN_NAME matches "di_dv"; a second derivative must not become it.
    assert snake(split_label("dI/dV", slash_unit=True)[0]) == "di_dv"
    assert snake(split_label("dI/dV (a.u.)", slash_unit=True)[0]) == "di_dv"
    assert snake(split_label("d2I/dV2", slash_unit=True)[0]) == "d2i_dv2"


BIAS = np.linspace(-1.0, 1.0, 201)


def text_spectrum(didv_head: str) -> bytes:
    """A tab-separated point spectrum of an invented Cu(111)-like junction: current in pA and
    a lock-in dI/dV step at the surface-state onset, −0.44 V (sample bias)."""
    current_pa = 20.0 * BIAS + 10.0 * BIAS**3
    lockin = 1.0 + np.tanh((BIAS + 0.44) / 0.03)
    lines = [
        "# point spectrum, LTM-1",
        "# bias sign convention: sample",
        f"Bias/V\tCurrent / pA\t{didv_head}",
    ]
    rows = zip(BIAS, current_pa, lockin, strict=True)
    lines += [f"{v:.5f}\t{i:.6f}\t{g:.6f}" for v, i, g in rows]
    return ("\n".join(lines) + "\n").encode()


def test_a_text_spectrum_with_a_did_v_column_is_read_with_its_lock_in_channel():
    parsed = read_file("point.txt", text_spectrum("dI/dV"))
    assert parsed.kind == "spectrum"
    assert list(parsed.channels) == ["current", "di_dv"]
    assert parsed.units["current"] == "A" and parsed.units["bias_v"] == "V"
    assert parsed.channels["current"][-1] == pytest.approx(30e-12)


@pytest.mark.django_db
def test_a_text_spectrum_with_a_did_v_column_is_ingested_with_its_lock_in_dI_dV(
    member, settings, tmp_path, django_capture_on_commit_callbacks
):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    body = {"file": io.BytesIO(text_spectrum("dI/dV")), "metadata": json.dumps({})}
    body["file"].name = "point_0007.txt"
    with django_capture_on_commit_callbacks(execute=True):
        response = Client().post(
            "/api/v1/files", body, headers={"Authorization": f"Bearer {raw}"}
        )
    assert response.status_code == 201, response.content
    record = AcquiredFile.objects.get(pk=response.json()["id"])
    assert record.status == "ready", record.error
    assert record.kind == "spectrum"
    stats = record.stats
    assert stats["didv_channel"] == "di_dv"
    assert stats["didv_source"] == "lock-in"
    # A lock-in column without a unit is scaled to the current's numerical dI/dV (positive:
    # the phase is right).
    assert stats["didv_lockin_scale"] > 0
    # The onset of the lock-in step, not of the current's smooth cubic derivative.
    assert stats["onset_v"] == pytest.approx(-0.44, abs=0.01)
    assert stats["norm_conductance_epsilon_v"] == pytest.approx(0.2)
    assert stats["norm_conductance_min"] is not None
