"""The figures ``make bench`` and ``make load`` write: the JSON carries what the line shows."""

from __future__ import annotations

import json

from labbook.bench import Figure, write_figures


def test_a_figure_in_json_carries_value_floor_ratio_goal_and_verdict(tmp_path):
    within = Figure("search p95", 80.0, "ms", 20.0, "SELECT 1", goal_value=100.0)
    above = Figure("render", 9.0, "ms", 2.0, "Pillow alone", goal_ratio=3.0)
    free = Figure("no goal", 1.0, "s", 0.0, "nothing")
    path = write_figures(tmp_path / "bench" / "latest.json", [within, above, free], run="x")

    document = json.loads(path.read_text())
    first, second, third = document["figures"]
    assert (first["name"], first["value"], first["unit"], first["floor"]) == (
        "search p95",
        80.0,
        "ms",
        20.0,
    )
    assert first["floor_label"] == first["floor_name"] == "SELECT 1"
    assert (first["ratio"], first["goal"], first["passed"]) == (4.0, "≤ 100 ms", True)
    assert (second["ratio"], second["goal"], second["passed"]) == (4.5, "≤ 3×", False)
    assert (third["ratio"], third["goal"], third["passed"]) == (None, None, None)
    assert document["passed"] is False  # one figure above its goal fails the run
    assert document["run"] == "x"
    machine = document["machine"]
    assert machine["cpus"] >= 1 and machine["measured_at"].endswith("+00:00")
    assert not (tmp_path / "bench" / "latest.json.partial").exists()
