"""Processing stores the normalised conductance (dI/dV)/(I/V) of a spectrum (and of a grid's
mean spectrum) with its ε, and the traces the dataset page draws; the search list leaves the
traces out.

Sources of the expected values: for an ohmic junction I = V/R, dI/dV = I/V = 1/R, so the
ratio is 1 at every bias, broadened or not. For I = a·V + b·V³, dI/dV = a + 3bV² and
I/V = a + bV² (analytic); I/V is broadened as R. M. Feenstra, Phys. Rev. B 50, 4561 (1994)
(the formula of ``labbook.science.spectra.broadened_iv``), recomputed here independently as the
plain n × n quadrature of the same integral, not with the O(n) sums processing uses.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from django.test import Client

from labbook.accounts.actions import mint_token
from labbook.datafiles import processing
from labbook.datafiles.models import AcquiredFile
from labbook.datafiles.processing import analyse
from labbook.datafiles.readers import read_file

# 1000 points: no sample at V = 0, where I/V is 0/0 and the science interpolates it.
BIAS = np.linspace(-1.0, 1.0, 1000)
A_S, B_S_PER_V2 = 1e-9, 2e-9  # a = 1 nS, b = 2 nA/V³ (invented, tunnelling-sized)


def npz_bytes(**arrays: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def analysed(arrays: dict[str, np.ndarray], units: dict[str, str], kind: str | None = None):
    metadata: dict = {"units": units}
    if kind:
        metadata["kind"] = kind
    parsed = read_file("sweep.npz", npz_bytes(**arrays), metadata=metadata)
    return analyse(parsed, {}).stats


def dense_broadened_iv(bias: np.ndarray, current: np.ndarray, epsilon: float) -> np.ndarray:
    """Feenstra's broadened I/V by direct quadrature: Σ_j K_ij (I/V)_j w_j / Σ_j K_ij w_j with
    K_ij = exp(−|V_i − V_j|/ε) and trapezoidal weights w on the (uniform) bias grid."""
    weights = np.gradient(bias)
    weights[[0, -1]] /= 2
    kernel = np.exp(-np.abs(bias[:, None] - bias[None, :]) / epsilon)
    return kernel @ (current / bias * weights) / (kernel @ weights)


def stored_points(n: int) -> np.ndarray:
    """The indices the traces keep: every ⌈(n−1)/511⌉-th and the last."""
    stride = -(-(n - 1) // 511)
    indices = np.arange(0, n, stride)
    return indices if indices[-1] == n - 1 else np.append(indices, n - 1)


def test_a_cubic_junction_matches_the_analytic_ratio_over_the_broadened_iv():
    current = A_S * BIAS + B_S_PER_V2 * BIAS**3
    didv = A_S + 3 * B_S_PER_V2 * BIAS**2  # analytic, stored as a lock-in in nA/V
    stats = analysed(
        {"bias": BIAS, "current": current, "didv": didv * 1e9},
        {"bias": "V", "current": "A", "didv": "nA/V"},
    )
    assert stats["didv_source"] == "lock-in" and "didv_lockin_scale" not in stats
    # ε is the documented choice: 10 % of the 2 V span.
    assert stats["norm_conductance_epsilon_v"] == pytest.approx(0.2, rel=1e-12)
    epsilon = stats["norm_conductance_epsilon_v"]
    expected = didv / dense_broadened_iv(BIAS, current, epsilon)

    traces = stats["traces"]
    kept = stored_points(BIAS.size)
    assert len(traces["norm_conductance"]) == kept.size == 501
    got = np.array(traces["norm_conductance"], dtype=float)
    assert got == pytest.approx(expected[kept], rel=1e-9)
    assert stats["norm_conductance_min"] == pytest.approx(expected.min(), rel=1e-9)
    assert stats["norm_conductance_max"] == pytest.approx(expected.max(), rel=1e-9)
    assert np.array(traces["bias_v"]) == pytest.approx(BIAS[kept], rel=1e-12)
    assert np.array(traces["current_a"]) == pytest.approx(current[kept], rel=1e-12)
    assert np.array(traces["didv_a_per_v"]) == pytest.approx(didv[kept], rel=1e-12)

    # Near 0 V, far from the ends, the broadening over an unbounded range would give
    # (a + 3bV²)/(a + b(V² + 2ε²)) (the kernel's second moment is 2ε²): the stored ratio is
    # within the 2.4 % the finite ±1 V range adds there, and well below the plain ratio
    # (a + 3bV²)/(a + bV²), which is 1 at 0 V where the broadened one is ~0.86.
    middle = np.abs(BIAS[kept]) < 0.2
    unbounded = (A_S + 3 * B_S_PER_V2 * BIAS[kept] ** 2) / (
        A_S + B_S_PER_V2 * (BIAS[kept] ** 2 + 2 * epsilon**2)
    )
    assert got[middle] == pytest.approx(unbounded[middle], rel=0.025)
    plain = (A_S + 3 * B_S_PER_V2 * BIAS[kept] ** 2) / (A_S + B_S_PER_V2 * BIAS[kept] ** 2)
    assert np.all(got[middle] < plain[middle] - 0.05)


@pytest.mark.parametrize("points", [1001, 2000, 512, 60])
def test_an_ohmic_junction_is_one_everywhere_and_traces_keep_at_most_512_points(points):
    bias = np.linspace(-0.5, 1.5, points)  # a sample at V = 0 for 1001 points
    current = bias / 1e9  # 1 GΩ: 1 nA at 1 V
    stats = analysed({"bias": bias, "current": current}, {"bias": "V", "current": "A"})
    assert stats["didv_source"] == "numerical"
    assert stats["norm_conductance_epsilon_v"] == pytest.approx(0.2, rel=1e-12)
    assert stats["norm_conductance_min"] == pytest.approx(1.0, rel=1e-9)
    assert stats["norm_conductance_max"] == pytest.approx(1.0, rel=1e-9)
    traces = stats["traces"]
    lengths = {len(traces[key]) for key in ("bias_v", "current_a", "didv_a_per_v")}
    assert lengths == {len(traces["norm_conductance"])}
    assert len(traces["bias_v"]) == points if points <= 512 else len(traces["bias_v"]) <= 512
    assert traces["bias_v"][0] == pytest.approx(-0.5) and traces["bias_v"][-1] == pytest.approx(1.5)
    assert np.array(traces["norm_conductance"]) == pytest.approx(np.ones(lengths.pop()), rel=1e-9)
    json.dumps(stats, allow_nan=False)  # JSON-finite: jsonb refuses NaN


@pytest.mark.parametrize("points", [2, 511, 512, 513, 1023, 1024, 1025, 4097, 100_000])
def test_the_stride_keeps_both_ends_and_never_more_than_512_points(points):
    indices = processing._trace_indices(points)
    assert indices[0] == 0 and indices[-1] == points - 1
    assert indices.size == points if points <= 512 else indices.size <= 512
    steps = np.diff(indices)
    assert np.all(steps > 0)
    if points > 512:
        assert steps[:-1].min() == steps[:-1].max()  # one stride, the last step shorter
        assert indices.size >= 256  # not thinned more than the limit needs


def test_a_spectrum_without_current_says_so_and_keeps_its_lock_in_trace():
    lockin = 1e-3 * (1.0 + np.tanh((BIAS + 0.44) / 0.02))  # a step, in volts (uncalibrated)
    stats = analysed({"bias": BIAS, "lockin_x": lockin}, {"bias": "V", "lockin_x": "V"})
    assert stats["norm_conductance_error"] == "no current channel"
    assert "norm_conductance_min" not in stats and "norm_conductance_epsilon_v" not in stats
    traces = stats["traces"]
    assert traces["current_a"] is None and traces["norm_conductance"] is None
    assert traces["didv_a_per_v"] is None  # volts are not A/V
    assert traces["didv_lockin_unit"] == "V"
    assert np.array(traces["didv_lockin"]) == pytest.approx(lockin[stored_points(BIAS.size)])


def test_an_error_of_the_science_is_a_message_not_a_crash():
    # A current of zero everywhere has no I/V to divide by (ScienceInputError, argument
    # current_a); a lock-in in siemens is a calibrated dI/dV, so the division is tried.
    stats = analysed(
        {"bias": BIAS, "current": np.zeros_like(BIAS), "didv": np.full_like(BIAS, 1e-9)},
        {"bias": "V", "current": "A", "didv": "S"},
    )
    assert stats["norm_conductance_error"] == "current_a is zero everywhere"
    assert stats["norm_conductance_min"] is None and stats["norm_conductance_max"] is None
    assert stats["traces"]["norm_conductance"] is None
    assert stats["didv_min_a_per_v"] == pytest.approx(1e-9)


def test_a_grid_mean_spectrum_with_a_lost_bias_point_stores_none_there():
    # Every spectrum of a 3 × 4 grid lost bias point 10: the mean current is NaN there, the
    # numerical dI/dV is refused (spectra must be finite) and the trace says None.
    bias = np.linspace(-1.0, 1.0, 101)
    current = np.broadcast_to(bias / 1e9, (3, 4, 101)).copy()
    current[:, :, 10] = np.nan
    stats = analysed({"bias": bias, "current": current}, {"bias": "V", "current": "A"}, "grid")
    assert "finite" in stats["didv_error"]
    assert stats["norm_conductance_error"] == "no dI/dV"
    traces = stats["traces"]
    assert traces["current_a"][10] is None
    assert traces["current_a"][11] == pytest.approx(bias[11] / 1e9)
    json.dumps(stats, allow_nan=False)


def test_a_grid_stores_the_normalised_conductance_of_its_mean_spectrum():
    bias = np.linspace(-1.0, 1.0, 101)
    gain = np.linspace(0.5, 1.5, 12).reshape(3, 4, 1)  # a different junction at each pixel
    current = (bias / 1e9)[None, None, :] * gain
    stats = analysed({"bias": bias, "current": current}, {"bias": "V", "current": "A"}, "grid")
    assert stats["map"] == "mean dI/dV over bias"
    # The mean of ohmic spectra is ohmic: 1 at every bias.
    assert stats["norm_conductance_min"] == pytest.approx(1.0, rel=1e-9)
    assert stats["norm_conductance_max"] == pytest.approx(1.0, rel=1e-9)
    assert len(stats["traces"]["norm_conductance"]) == 101


@pytest.mark.django_db
def test_the_dataset_answer_carries_the_traces_and_the_search_list_does_not(
    member, settings, tmp_path, django_capture_on_commit_callbacks
):
    settings.MEDIA_ROOT = str(tmp_path / "files")
    _, raw = mint_token(member)
    client = Client()
    headers = {"Authorization": f"Bearer {raw}"}
    current = A_S * BIAS + B_S_PER_V2 * BIAS**3
    body = {
        "file": io.BytesIO(npz_bytes(bias=BIAS, current=current)),
        "metadata": json.dumps({"units": {"bias": "V", "current": "A"}}),
    }
    body["file"].name = "cubic.npz"
    with django_capture_on_commit_callbacks(execute=True):
        response = client.post("/api/v1/files", body, headers=headers)
    assert response.status_code == 201, response.content
    pk = response.json()["id"]
    assert AcquiredFile.objects.get(pk=pk).status == "ready"

    one = client.get(f"/api/v1/files/{pk}", headers=headers).json()
    assert one["stats"]["norm_conductance_epsilon_v"] == pytest.approx(0.2)
    assert len(one["stats"]["traces"]["norm_conductance"]) == 501

    listed = client.get("/api/v1/files", {"kind": "spectrum"}, headers=headers).json()
    (item,) = [i for i in listed["items"] if i["id"] == pk]
    assert "traces" not in item["stats"] and "detail" not in item["stats"]
    # The summary numbers stay in the list.
    assert item["stats"]["norm_conductance_min"] == one["stats"]["norm_conductance_min"]
