"""The demo site end to end: simulate (seeded) -> inspect -> evaluate against the truth.

The bounds are pvscan's own acceptance targets for detection, temperatures, losses and
co-registration, the detection targets held as binomial rates (scipy.stats.binom); the truth
is the simulator's physics (Faiman temperatures, defects that
turn electrical output into heat), independent of the detection code.
"""
from __future__ import annotations

import csv
import json
from collections import defaultdict
from pathlib import Path

import pytest
from conftest import test_seed
from scipy.stats import binom

from pvscan.evaluate import evaluate
from pvscan.pipeline import inspect_flight
from pvscan.simulate import simulate_flight

DEMO = Path(__file__).resolve().parent.parent / "demo_site" / "scenario.toml"

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    sim = simulate_flight(DEMO, d / "flight", seed=test_seed())
    inspect_flight(sim.manifest, out_dir=d / "result", report=False)
    return d


@pytest.fixture(scope="module")
def scores(demo_run):
    return evaluate(demo_run / "flight", demo_run / "result")


#: pvscan's detection targets as rates over defective modules: recall >= 0.95, precision >= 0.95,
#: and (the weakest class) 0.85 of true defects found and named right.
RECALL_TARGET, PRECISION_TARGET, CLASS_TARGET = 0.95, 0.95, 0.85
#: A flight fails a target when its count of misses is less likely than this at the target's
#: rate (binomial, one-sided).
ALPHA = 0.01


def _most_misses(n: int, target: float) -> int:
    """Most misses of ``n`` trials still consistent with a success rate ``target``: the
    binomial (scipy.stats.binom) quantile at ``1 - ALPHA``."""
    return int(binom.ppf(1.0 - ALPHA, n, 1.0 - target))


def test_detection_scores(scores):
    # One demo flight is one draw of about 50 defective modules among 4,000: its recall is a
    # binomial count, whose spread at n = 50 and a 0.95 rate (1.5 misses, one sigma) is wider
    # than the gap between the target and the rates measured over many flights (seeds 1-10 of
    # this scenario: 6 misses in 527 defective modules, 9 false modules in 530 findings). A
    # flight fails when its misses would occur at most 1 % of the time at the target rate
    # (n = 50: more than 7 misses): a detector at the target fails on fewer than 1 seed in 100,
    # one missing 15 % of the defects on about half the seeds, 20 % on four in five. The weak
    # classes (PID modules far from the negative end, open modules at a seam's edge, PID at
    # a seam's edge) are tested as rates over 20 tables in tests/test_classify.py.
    m = scores["module"]
    n_true = m["true_positive"] + m["false_negative"]
    n_pred = m["true_positive"] + m["false_positive"]
    assert n_true >= 40 and n_pred >= 1
    assert m["false_negative"] <= _most_misses(n_true, RECALL_TARGET), m
    assert m["false_positive"] <= _most_misses(n_pred, PRECISION_TARGET), m
    # false alarms among healthy modules: at most 3 per 1,000 (seeds 1-10: at most 1.0)
    assert m["false_alarms_per_1000_healthy"] <= 3.0
    # found and named right, pooled over the classes, at the weakest class's target; and no
    # class the flight has is missed entirely (a class-wide failure, not noise)
    right = sum(round(v["recall"] * v["n_true"]) for v in scores["per_class"].values() if v["n_true"])
    assert n_true - right <= _most_misses(n_true, CLASS_TARGET), scores["per_class"]
    for cls, v in scores["per_class"].items():
        if v["n_true"]:
            assert v["recall"] > 0.0, cls


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


def _features(path: Path) -> list[dict]:
    return [f["properties"] for f in json.loads(path.read_text())["features"]]


def test_pid_is_one_anomaly_per_string(demo_run):
    # PID acts on a string (its cells' potential to ground grows towards the negative end;
    # IEC TS 62804-1 stresses modules that way, from memory): each finding is one anomaly over
    # a run of one string's modules from its negative end (string_index 1), one work order,
    # and its loss is split over its modules so the plant total counts it once (CONTRACT.md)
    layout = {p["module_id"]: p for p in _features(demo_run / "flight" / "truth.geojson")}
    first = {p["string_id"]: m for m, p in layout.items() if p["string_index"] == 1}
    true_pid = {p["string_id"] for p in layout.values() if p["defect"] == "pid"}
    pid = [p for p in _features(demo_run / "result" / "anomalies.geojson") if p["defect"] == "pid"]
    # at least one true PID string found (whether a finding is a true one is a matter of the
    # detection rates above; the form of every PID finding is checked here)
    assert {layout[a["module_id"]]["string_id"] for a in pid} & true_pid, "the demo has PID strings; none found"
    seen = set()
    for a in pid:
        strings = {layout[m]["string_id"] for m in a["module_ids"]}
        assert len(strings) == 1, a["module_ids"]
        (sid,) = strings
        assert sid not in seen
        seen.add(sid)
        assert a["module_id"] == first[sid] == a["module_ids"][0]
        idx = sorted(layout[m]["string_index"] for m in a["module_ids"])
        assert idx == list(range(1, len(idx) + 1))
        assert a["severity"] == "repair" and a["power_loss_w"] > 0
    with open(demo_run / "result" / "workorders.csv", newline="") as fh:
        orders = [r for r in csv.DictReader(fh) if r["defect"] == "pid"]
    assert len(orders) == len(pid)
    # each module keeps its own share: over the string's modules they add up to the total
    share = defaultdict(float)
    owners = {}
    for p in _features(demo_run / "result" / "modules.geojson"):
        share[p["module_id"]] = p["power_loss_w"] or 0.0
        owners[p["module_id"]] = list(p["anomaly_ids"] or [])
    for a in pid:
        if any(owners[m] != [a["anomaly_id"]] for m in a["module_ids"]):
            continue  # a module with a second anomaly carries both shares
        # the GeoJSON writer rounds every value to 4 decimals (0.1 mW): the rounded shares add
        # up to the rounded total within half a unit of the last place each
        n = len(a["module_ids"]) + 1
        assert sum(share[m] for m in a["module_ids"]) == pytest.approx(a["power_loss_w"], abs=n * 0.5e-4 + 1e-9)
