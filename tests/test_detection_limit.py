"""The detection limit a result states: ``[report] detection_limit_spreads`` times the healthy
modules' module-to-module scatter (the ``module_spread`` check's ``module_spread_k``).

Stated because a fault that warms a module by less than a few times the scatter of healthy
modules cannot be told from it (common practice: a signal under about three times the noise
is not reliably seen, from memory); the random flights' misses under that contrast were faint
PID strings and soiling bands (``pvscan evaluate``'s ``missed``). The figures below are the
settings' value times a scatter drawn from the seed, worked by hand.
"""
from __future__ import annotations

import json

import numpy as np
from test_report import build_result

from pvscan.cli._summary import summary_lines
from pvscan.io.settings import load_pipeline
from pvscan.report import detection_limit, write_report


def _with_spread(folder, spread_k):
    path = folder / "summary.json"
    s = json.loads(path.read_text(encoding="utf-8"))
    s["validity"]["checks"].append({"name": "module_spread", "value": 0.2, "limit": 0.3, "unit": "", "passed": True,
                                    "source": "test", "module_spread_k": spread_k})
    path.write_text(json.dumps(s), encoding="utf-8")
    return s


def test_the_limit_is_the_scatter_times_the_setting(tmp_path, seed):
    spread = float(np.round(np.random.default_rng(seed).uniform(0.2, 1.2), 3))
    k = float(load_pipeline()["report"]["detection_limit_spreads"])
    folder = build_result(tmp_path)
    s = _with_spread(folder, spread)
    assert detection_limit(s, k) == (spread, k * spread)
    assert detection_limit({"validity": {"checks": []}}, k) is None
    html = write_report(folder).read_text(encoding="utf-8")
    assert f"less than about {k * spread:.1f} K" in html and f"scatter {spread:.2f} K" in html
    text = " ".join(summary_lines(folder))
    assert f"less than ~{k * spread:.1f} K" in text


def test_no_limit_without_a_recorded_scatter(tmp_path):
    folder = build_result(tmp_path)
    assert "Detection limit" not in write_report(folder).read_text(encoding="utf-8")
    assert "detection limit" not in " ".join(summary_lines(folder))


def test_the_run_s_own_factor_is_used(tmp_path, seed):
    # a run made with a tuned pipeline records its [report] settings in summary.json; the limit
    # it states is its own, not the default pipeline's
    spread = float(np.round(np.random.default_rng(seed + 1).uniform(0.2, 1.2), 3))
    folder = build_result(tmp_path)
    s = _with_spread(folder, spread)
    s.setdefault("settings", {})["report"] = {"detection_limit_spreads": 4.5}
    (folder / "summary.json").write_text(json.dumps(s), encoding="utf-8")
    assert detection_limit(s, 3.0) == (spread, 4.5 * spread)
    assert f"less than ~{4.5 * spread:.1f} K" in " ".join(summary_lines(folder))
