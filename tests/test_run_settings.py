"""A result says how it was made: summary.json records the settings the run read, and the
report's method notes and severity reasons come from that record, not from whatever pipeline
file happens to be on disk when the report is written.

The heat-loss coefficients are drawn per seed (PVSCAN_TEST_SEED) inside the range of
published Faiman fits (u0 about 20-35 W/(m2 K), u1 about 3-10 W s/(m3 K); Faiman 2008,
doi:10.1002/pip.813, and pvlib's ``temperature.faiman`` defaults 25.0 / 6.84), so the check
holds for any value the pipeline may be given, not for one remembered pair.
"""
from __future__ import annotations

import json
import re
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from conftest import test_seed
from test_report import build_result, parse

from pvscan.io.settings import SECTIONS, load_pipeline
from pvscan.pipeline import OTHER_COMMANDS_SECTIONS, inspect_flight, run_settings
from pvscan.simulate import simulate_flight


def _text(fragment: str) -> str:
    return re.sub(r"\s+", " ", " ".join(parse(fragment).text))


def _section(html_text: str, sid: str) -> str:
    return html_text.split(f'id="{sid}"', 1)[1].split("</section>", 1)[0]


def _drawn_settings():
    rng = np.random.default_rng(test_seed(17))
    u0 = round(float(rng.uniform(20.0, 35.0)), 2)
    u1 = round(float(rng.uniform(3.0, 10.0)), 2)
    repair = round(float(rng.uniform(6.0, 14.0)), 1)  # [severity] hot-cell repair rule [K]
    pipe = load_pipeline().replace(heat={"u0": u0, "u1": u1},
                                   severity={"repair_hot_cell_delta_t_norm_k": repair})
    return pipe, u0, u1, repair


def test_run_settings_are_the_inspection_sections():
    pipe, u0, u1, repair = _drawn_settings()
    rec = run_settings(pipe)
    assert set(rec) == set(SECTIONS) - OTHER_COMMANDS_SECTIONS
    assert {"heat", "reference", "severity", "classify", "conditions"} <= set(rec)
    assert rec["heat"] == {"u0": u0, "u1": u1}
    assert rec["severity"]["repair_hot_cell_delta_t_norm_k"] == repair
    json.dumps(rec, allow_nan=False)  # plain JSON


@pytest.mark.slow
def test_summary_and_report_carry_the_settings_of_the_run(tmp_path):
    pipe, u0, u1, repair = _drawn_settings()
    scenario = {
        "site": {"name": "Test field Fern Hollow (invented)", "lon": 11.37, "lat": 47.26},
        "array": {"table_rows": 2, "tables_per_row": 1, "rows": 2, "cols": 8, "modules_per_string": 8},
        "layout": {"features": "tables"},
        "defects": {"hot_cell": 1, "open_module": 1},
    }
    sim = simulate_flight(scenario, tmp_path / "flight", seed=test_seed(3))
    res = inspect_flight(sim.manifest, pipe, tmp_path / "result")
    summary = json.loads((tmp_path / "result" / "summary.json").read_text())
    assert summary["settings"]["heat"] == {"u0": u0, "u1": u1}
    assert summary["settings"]["severity"] == json.loads(json.dumps(pipe.to_dict()["severity"]))
    # the normalisation the run applied is the recorded [heat]
    assert summary["normalisation"]["u0"] == u0 and summary["normalisation"]["u1"] == u1
    assert res.summary["settings"] == summary["settings"]

    text = _text(_section((tmp_path / "result" / "report.html").read_text(encoding="utf-8"), "method"))
    assert f"u0 = {u0:g} W/(m²·K)" in text and f"u1 = {u1:g} W·s/(m³·K)" in text
    assert f"repair hot cell delta t norm k {repair:g}" in text  # the [severity] rules the run used


def test_report_takes_severity_rules_from_the_result_not_the_pipeline_on_disk(tmp_path):
    """A result whose run used another hot-cell repair rule than the default pipeline: the
    cards explain its severities by the recorded rule."""
    default = float(load_pipeline()["severity"]["repair_hot_cell_delta_t_norm_k"])
    recorded = default + 3.5
    res = build_result(tmp_path)
    s = json.loads((res / "summary.json").read_text())
    s["settings"] = {"severity": {**load_pipeline().to_dict()["severity"],
                                  "repair_hot_cell_delta_t_norm_k": recorded}}
    (res / "summary.json").write_text(json.dumps(s))
    from pvscan.report import write_report

    text = _text(_section(write_report(res).read_text(encoding="utf-8"), "method"))
    assert f"repair hot cell delta t norm k {recorded:g}" in text
    assert f"repair hot cell delta t norm k {default:g}" not in text
