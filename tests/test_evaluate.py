"""Tests of the scorer (pvscan.evaluate) on hand-made truth/result pairs.

Expected values are worked by hand from the definitions (precision = TP / (TP + FP),
recall = TP / (TP + FN), RMSE = sqrt(mean(error^2))), the textbook definitions of
detection and regression scores (common practice).
"""
from __future__ import annotations

import json
import math

import pytest
from click.testing import CliRunner

from pvscan.errors import OutputError, SimulationError
from pvscan.evaluate import evaluate, format_report

LON0, LAT0 = 10.0, 45.0
W = 1.0 / 111_320 / math.cos(math.radians(LAT0))  # ~1 m in longitude [deg]
H = 1.0 / 111_320                                   # ~1 m in latitude [deg]


def _square(k, dx=0.0):
    x0 = LON0 + (2.0 * k + dx) * W
    return {"type": "Polygon", "coordinates": [[[x0, LAT0], [x0 + W, LAT0], [x0 + W, LAT0 + 2 * H],
                                                 [x0, LAT0 + 2 * H], [x0, LAT0]]]}


def _fc(features, **top):
    return {"type": "FeatureCollection", **top, "features": features}


# ten modules: truth defects at 0, 1, 2, 3 (two of one open string group); result finds
# 0 (right class), 1 (wrong class), misses 2 and 3, and raises a false alarm on 7.
TRUTH = [
    ("M0", "open_module", 410.0, 5.0, 0), ("M1", "hot_cell", 20.0, 30.0, 1),
    ("M2", "open_string", 410.0, 5.5, 2), ("M3", "open_string", 410.0, 5.4, 2),
] + [(f"M{k}", None, 0.0, 0.0, None) for k in range(4, 10)]
PRED = {"M0": ("open_module", 400.0), "M1": ("junction_box", 10.0), "M7": ("hot_cell", 15.0)}
T_TRUE = [40.0 + 0.1 * k for k in range(10)]
ERR = [0.0, 0.0, 0.0, 0.0, 0.3, -0.3, 0.3, -0.3, 0.3, -0.3]   # healthy errors +-0.3 K


def _write(tmp_path, *, ids=True, shift=0.0, anomalies=True, reversed_ids=False):
    tdir = tmp_path / "truth"
    rdir = tmp_path / "result"
    tdir.mkdir()
    rdir.mkdir()
    feats = []
    for k, (mid, d, loss, dtn, grp) in enumerate(TRUTH):
        feats.append({"type": "Feature", "geometry": _square(k), "properties": {
            "module_id": mid, "defect": d, "power_loss_w": loss, "delta_t_norm_k": dtn,
            "defect_group": grp, "t_true_median_c": T_TRUE[k], "distractors": ["seam"] if k == 7 else []}})
    (tdir / "truth.geojson").write_text(json.dumps(_fc(feats, pvscan_truth={"layout_offset_m": [0.5, 0.0]})))
    res = []
    for k, (mid, *_rest) in enumerate(TRUTH):
        d, loss = PRED.get(mid, (None, 0.0))
        res.append({"type": "Feature", "geometry": _square(k, shift), "properties": {
            "module_id": (TRUTH[9 - k][0] if reversed_ids else mid) if ids else f"X{k}",
            "defect": d, "power_loss_w": loss,
            "t_median_c": T_TRUE[k] + ERR[k], "delta_t_norm_k": 1.0 if d else 0.0}})
    (rdir / "modules.geojson").write_text(json.dumps(_fc(res)))
    if anomalies:
        an = [{"type": "Feature", "geometry": None, "properties": {"module_id": "M0", "defect": "open_module",
                                                                   "delta_t_norm_k": 4.0}},
              {"type": "Feature", "geometry": None, "properties": {"module_id": "M1", "defect": "junction_box",
                                                                   "delta_t_norm_k": 27.0}}]
        (rdir / "anomalies.geojson").write_text(json.dumps(_fc(an)))
    (rdir / "summary.json").write_text(json.dumps({"layout_shift_m": [-0.4, 0.1]}))
    return tdir, rdir


def test_scores_worked_by_hand(tmp_path):
    s = evaluate(*_write(tmp_path))
    m = s["module"]
    # TP = 2 (M0, M1), FP = 1 (M7), FN = 2 (M2, M3)
    assert (m["true_positive"], m["false_positive"], m["false_negative"]) == (2, 1, 2)
    assert m["precision"] == pytest.approx(2 / 3, abs=1e-6)
    assert m["recall"] == pytest.approx(0.5)
    assert m["f1"] == pytest.approx(2 * (2 / 3) * 0.5 / (2 / 3 + 0.5), abs=1e-6)
    assert m["false_alarms_per_1000_healthy"] == pytest.approx(1000 / 6, abs=1e-3)
    assert m["false_alarms_by_distractor"] == {"seam": 1}
    pc = s["per_class"]
    assert pc["open_module"]["recall"] == 1.0 and pc["hot_cell"]["recall"] == 0.0
    assert pc["hot_cell"]["detected_any_class"] == 1.0
    assert pc["open_string"]["recall"] == 0.0 and pc["junction_box"]["precision"] == 0.0
    cm = s["confusion"]["matrix"]
    assert cm["hot_cell"]["junction_box"] == 1 and cm["open_string"]["none"] == 2
    assert cm["none"]["hot_cell"] == 1 and cm["none"]["none"] == 5
    # losses: true 410 + 20 + 820 = 1250 W, predicted 400 + 10 + 15 = 425 W
    pl = s["power_loss"]
    assert pl["true_total_w"] == 1250.0 and pl["predicted_total_w"] == 425.0
    assert pl["ratio"] == pytest.approx(0.34) and pl["abs_error_w"] == -825.0
    per = {a["defect"]: a for a in pl["per_anomaly"]}
    assert per["open_module"]["rel_error"] == pytest.approx(-10 / 410, abs=1e-6)
    assert per["open_string"]["n_modules"] == 2 and per["open_string"]["rel_error"] == -1.0
    # the electrical/thermal-deficit classes together: true 410 + 820 = 1230 W; predicted only
    # M0's 400 W (M1 is called a junction box, M7 a hot cell: not in those classes);
    # M0 within 25 %, the missed open string not -> 1 of 2
    g = pl["group"]
    assert g["true_total_w"] == 1230.0 and g["predicted_total_w"] == 400.0
    assert g["ratio"] == pytest.approx(400 / 1230, abs=1e-6)
    assert g["n_anomalies"] == 2 and g["share_within_25pct"] == 0.5
    # found and named right: only M0 (the open string was missed) -> 1 of 1 within 25 %
    assert per["open_module"]["classified_right"] and not per["open_string"]["classified_right"]
    assert g["n_classified_right"] == 1 and g["share_within_25pct_classified_right"] == 1.0
    k = pl["per_kind"]
    assert k["open_string"] == {"n": 1, "median_abs_rel_error": 1.0, "n_within_25pct": 0,
                                "n_classified_right": 0, "n_within_25pct_classified_right": 0}
    assert k["open_module"]["n_within_25pct_classified_right"] == 1
    # healthy RMSE: all errors +-0.3 K -> 0.3 K, bias 0
    t = s["temperature"]
    assert t["healthy_rmse_k"] == pytest.approx(0.3, abs=1e-6)
    assert t["healthy_bias_k"] == pytest.approx(0.0, abs=1e-6)
    assert t["n_healthy_no_distractor"] == 5 and t["healthy_rmse_no_distractor_k"] == pytest.approx(0.3, abs=1e-6)
    # delta_t_norm errors: M0 |4 - 5| = 1 (anomaly), M1 |27 - 30| = 3 (anomaly),
    # M2 |0 - 5.5| = 5.5, M3 |0 - 5.4| = 5.4 (modules.geojson) -> median of (1, 3, 5.4, 5.5) = 4.2
    assert t["delta_t_norm_median_abs_error_k"] == pytest.approx(4.2, abs=1e-6)
    assert t["delta_t_norm_median_abs_error_detected_k"] == pytest.approx(2.0, abs=1e-6)
    # registration: applied shift (-0.4, 0.1) against a drawn offset (0.5, 0): error |(0.1, 0.1)|
    assert s["registration"]["error_m"] == pytest.approx(math.hypot(0.1, 0.1), abs=1e-6)
    text = format_report(s)
    assert "precision 66.7 %" in text and "recall 50.0 %" in text


def test_matching_by_centroid_when_ids_differ(tmp_path):
    s = evaluate(*_write(tmp_path, ids=False, shift=0.1, anomalies=False))
    assert s["matched_by"] == "centroid" and s["n_matched"] == 10
    assert s["module"]["true_positive"] == 2
    # without anomalies the module values are used: |1 - 5|, |1 - 30|, 5.5, 5.4 -> median 5.45
    assert s["temperature"]["delta_t_norm_median_abs_error_k"] == pytest.approx(5.45, abs=1e-6)


def test_matching_by_position_when_ids_sit_elsewhere(tmp_path):
    # Same ids, but numbered from the other end of the row: positions decide.
    s = evaluate(*_write(tmp_path, reversed_ids=True, anomalies=False))
    assert s["matched_by"] == "centroid"
    assert (s["module"]["true_positive"], s["module"]["false_positive"]) == (2, 1)


def test_missing_inputs_raise(tmp_path):
    tdir, rdir = _write(tmp_path)
    with pytest.raises(SimulationError, match="truth.geojson: file not found"):
        evaluate(tmp_path / "nowhere", rdir)
    (rdir / "modules.geojson").write_text("{not json")
    with pytest.raises(OutputError, match="modules.geojson: not valid JSON"):
        evaluate(tdir, rdir)


def test_cli_writes_json_and_fails_cleanly(tmp_path):
    from pvscan.cli.main import cli

    tdir, rdir = _write(tmp_path)
    runner = CliRunner()
    r = runner.invoke(cli, ["evaluate", str(tdir), str(rdir), "--json", str(tmp_path / "scores.json")])
    assert r.exit_code == 0, r.output
    assert "confusion" in r.output
    assert json.loads((tmp_path / "scores.json").read_text())["module"]["true_positive"] == 2
    r = runner.invoke(cli, ["evaluate", str(tmp_path / "nowhere"), str(rdir)])
    assert r.exit_code == 1 and "Traceback" not in r.output
