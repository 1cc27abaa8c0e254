"""``pvscan inspect`` without ``flight.layout``: the layout is detected in the ortho first.

The reference is the simulator's own truth (outside the detection and classification
code): the module polygons as the ortho shows them (``truth_ortho.geojson``) and the defect
each module was given. Targets: at least 99 % of the modules found, at most 1 % extra,
95 % of the corner errors within 5 cm (about one pixel; common practice for a module
layout used to cut pixels per module); module recall and precision of at least 0.95 for the
classes that need no string ids (open string and PID follow a string from its negative end,
IEC TS 62446-3:2017 describes both as string patterns, so they need the stringing), held as
binomial rates (scipy.stats.binom, 1 % one-sided) on the handful of defects of one flight.
The layout targets are measured over many flights by benchmarks/validate_layout_detect.py;
here what holds on every flight.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner
from conftest import test_seed
from scipy.stats import binom

from pvscan.cli.main import cli
from pvscan.evaluate import STRING_CLASSES, evaluate
from pvscan.simulate import simulate_flight

SCENARIO = Path(__file__).resolve().parent / "scenarios" / "all_defects_rotated.toml"

pytestmark = pytest.mark.slow

#: Targets (see the module docstring).
FOUND_TARGET, EXTRA_MAX, CORNER_P95_M = 0.99, 0.01, 0.05
RECALL_TARGET = PRECISION_TARGET = 0.95
ALPHA = 0.01


def _most_misses(n: int, target: float) -> int:
    """Most misses of ``n`` trials still consistent with a success rate ``target``
    (scipy.stats.binom quantile at 1 - ALPHA)."""
    return int(binom.ppf(1.0 - ALPHA, n, 1.0 - target))


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A simulated flight (one of each defect, map rotation 12 deg, drawn layout 0.36 m off)
    whose manifest has no layout, inspected through the CLI."""
    d = tmp_path_factory.mktemp("nolayout")
    sim = simulate_flight(SCENARIO, d / "flight", seed=test_seed())
    text = Path(sim.manifest).read_text(encoding="utf-8")
    lines = [ln for ln in text.splitlines() if not ln.startswith("layout = ")]
    assert len(lines) == len(text.splitlines()) - 1
    manifest = d / "flight" / "no_layout.toml"
    manifest.write_text("\n".join(lines) + "\n", encoding="utf-8")
    res = CliRunner().invoke(cli, ["inspect", str(manifest), "--out", str(d / "result")])
    return d, res


def test_inspect_without_layout_says_it_detects_and_skips_string_patterns(run):
    d, res = run
    assert res.exit_code == 0, res.output + res.stderr
    assert "no flight.layout: detecting the module layout in the ortho" in res.stderr
    summary = json.loads((d / "result" / "summary.json").read_text(encoding="utf-8"))
    lay = summary["layout"]
    assert lay["source"] == "detected"
    assert lay["skipped_patterns"] == list(STRING_CLASSES)
    assert lay["detected"]["modules"] == lay["modules"]
    assert any("open_string and pid need string ids" in w for w in lay["warnings"])
    assert summary["inputs"]["layout"] == "detected in the ortho"
    # nothing was drawn, so nothing was placed
    assert summary["layout_shift_m"] == [0.0, 0.0]
    assert summary["registration"]["status"] == "not_run"
    anomalies = json.loads((d / "result" / "anomalies.geojson").read_text(encoding="utf-8"))["features"]
    assert not [f for f in anomalies if f["properties"]["defect"] in STRING_CLASSES]
    html = (d / "result" / "report.html").read_text(encoding="utf-8")
    assert "patterns not looked for" in html and "open_string, pid" in html
    # the end-of-run summary repeats the note
    assert "open_string and pid need string ids" in " ".join(res.output.split())


def test_detected_layout_finds_the_modules_where_the_ortho_shows_them(run):
    d, _ = run
    s = evaluate(d / "flight", d / "result")
    dl = s["detected_layout"]
    n = dl["truth_modules"]
    assert n == s["n_modules"] >= 100
    # what holds on every seed tried: no module where the truth has none (at most 1 %), the
    # median corner within 5 cm, and most tables found (the targets of 99 % found and a 5 cm
    # p95 hold on most flights only: a table whose ground is at the glass temperature can
    # still be missed; benchmarks/validate_layout_detect.py prints the rates)
    assert dl["extra"] <= EXTRA_MAX * n, dl
    assert dl["corner_error_m"]["median"] <= CORNER_P95_M, dl
    assert dl["found_fraction"] >= 0.5, dl
    # a matched module's centroid lies inside its truth polygon (the match is not a neighbour)
    assert dl["corner_error_m"]["max"] < 0.5 * 1.038, dl


def test_inspect_on_the_detected_layout_finds_the_defects_without_string_ids(run):
    d, _ = run
    s = evaluate(d / "flight", d / "result")
    ns = s["detected_layout"]["no_string_classes"]
    # the scenario draws one of each of seven classes that need no string ids; recall over the
    # defective modules the detected layout holds (missed tables are the layout's score)
    assert ns["n_true"] >= 7
    held = ns["n_true_in_layout"]
    assert held >= 1
    missed = held - round(ns["recall_in_layout"] * held)
    assert missed <= _most_misses(held, RECALL_TARGET), ns
    n_pred = ns["true_positive"] + ns["false_positive"]
    assert n_pred >= 1
    assert ns["false_positive"] <= _most_misses(n_pred, PRECISION_TARGET), ns
    # the string classes were not scored as misses of the detected layout's run
    assert set(ns["excluded"]) == set(STRING_CLASSES)


def test_commands_that_need_a_drawn_layout_say_so_in_one_line(run, tmp_path):
    d, _ = run
    manifest = d / "flight" / "no_layout.toml"
    for args in (["layout", "check", str(manifest), "--out", str(tmp_path / "c.gpkg")],
                 ["align", str(manifest), "--out", str(tmp_path / "a.gpkg")]):
        res = CliRunner().invoke(cli, args)
        assert res.exit_code == 1, res.output + res.stderr
        assert "flight.layout" in res.stderr and "Traceback" not in res.stderr
        assert len(res.stderr.strip().splitlines()) == 1
