"""The demo site end to end: simulate (seeded) -> inspect -> evaluate against the truth.

The bounds are pvscan's own acceptance targets for detection, temperatures, losses and
co-registration; the truth is the simulator's physics (Faiman temperatures, defects that
turn electrical output into heat), independent of the detection code.
"""
from __future__ import annotations

from pathlib import Path

import pytest

from pvscan.evaluate import evaluate
from pvscan.pipeline import inspect_flight
from pvscan.simulate import simulate_flight

DEMO = Path(__file__).resolve().parent.parent / "demo_site" / "scenario.toml"

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def scores(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    sim = simulate_flight(DEMO, d / "flight", seed=20260614)
    inspect_flight(sim.manifest, out_dir=d / "result", report=False)
    return evaluate(d / "flight", d / "result")


def test_detection_scores(scores):
    m = scores["module"]
    assert m["recall"] >= 0.95
    assert m["precision"] >= 0.95
    assert m["false_alarms_per_1000_healthy"] <= 3.0
    for cls, v in scores["per_class"].items():
        if v["n_true"]:
            assert v["recall"] >= 0.85, cls


def test_temperatures_and_normalised_delta_t(scores):
    t = scores["temperature"]
    assert t["healthy_rmse_k"] < 1.0
    assert t["delta_t_norm_median_abs_error_k"] <= 1.5


def test_electrical_losses(scores):
    per = scores["power_loss"]["per_anomaly"]
    kinds = ("bypassed_substring", "several_bypassed_substrings", "open_module", "open_string", "pid")
    true = sum(a["true_w"] for a in per if a["defect"] in kinds)
    pred = sum(a["predicted_w"] for a in per if a["defect"] in kinds)
    assert abs(pred / true - 1.0) <= 0.15


def test_layout_shift_recovered(scores):
    assert scores["registration"]["error_m"] <= 0.05
