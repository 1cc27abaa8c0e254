"""What the report says: validity on the first screen, the registration, the method's
parameters as the run recorded them, cautions once, why each finding has its severity, the
card's electrical and walking facts, colour scales, label placement, and how it is built
(templates, module sizes, a deterministic file).

The result folder comes from ``test_report.build_result`` (an invented plant of 24 modules
with three planted findings); each test edits its summary.json or workorders.csv.
"""
from __future__ import annotations

import csv
import json
import math
import re
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from conftest import test_seed
from test_report import PLANTED, build_result, parse

REPORT = Path(__file__).parents[1] / "pvscan" / "report"


def _edit_summary(res: Path, **changes) -> None:
    s = json.loads((res / "summary.json").read_text())
    s.update(changes)
    (res / "summary.json").write_text(json.dumps(s))


def _report(res: Path) -> str:
    from pvscan.report import write_report

    return write_report(res).read_text(encoding="utf-8")


def _section(html_text: str, sid: str) -> str:
    return html_text.split(f'id="{sid}"', 1)[1].split("</section>", 1)[0]


def _text(fragment: str) -> str:
    return re.sub(r"\s+", " ", " ".join(parse(fragment).text))


# ------------------------------------------------------------------ how it is built
def test_report_is_built_from_templates_with_small_modules():
    """No markup is assembled in Python: the report's modules hold no HTML tags, the
    templates do; every module stays under 600 lines."""
    for py in REPORT.glob("*.py"):
        src = py.read_text()
        assert len(src.splitlines()) < 600, py.name
        assert not re.search(r"<(tr|td|th|div|section|table|article|p|li|ul|img|span|a)[\s>]", src), py.name
    names = {p.name for p in (REPORT / "templates").glob("*.html")}
    assert {"report.html", "_validity.html", "_cards.html", "_worklist.html"} <= names


def test_templates_escape_values(tmp_path):
    """Autoescaping is on: a site name with markup is shown as text."""
    res = build_result(tmp_path)
    _edit_summary(res, site={"name": "<b>Field</b> & Co"})
    html_text = _report(res)
    assert "&lt;b&gt;Field&lt;/b&gt; &amp; Co" in html_text and "<b>Field</b>" not in html_text


def test_same_inputs_give_the_same_file(tmp_path):
    from pvscan.report import build_report

    res = build_result(tmp_path)
    assert build_report(res) == build_report(res)


def test_footer_names_no_folder(tmp_path):
    """The pipeline writes the report inside a staging folder renamed afterwards: its name must
    not appear anywhere in the page."""
    staging = tmp_path / ".staging-result-k3j9x"
    res = build_result(tmp_path)
    res.rename(staging)
    html_text = _report(staging)
    assert "staging" not in html_text and "k3j9x" not in html_text
    foot = html_text.split("<footer>", 1)[1].split("</footer>", 1)[0]
    assert "pvscan" in foot


# ------------------------------------------------------------------ validity and registration
def test_every_validity_check_on_the_first_screen_and_a_banner(tmp_path):
    """Checks are rendered whatever their name (the new registration/coverage/plausibility
    checks included), with measured value, limit, unit, result, source and message, before
    the map; a failed flight gets a banner naming its failed checks."""
    res = build_result(tmp_path)
    checks = [
        {"name": "registration", "value": 0.08, "limit": 0.5, "kind": "min", "unit": "-", "passed": False,
         "source": "pvscan registration", "message": "weak fit: run pvscan align"},
        {"name": "coverage", "value": 1.2, "limit": 5.0, "kind": "max", "unit": "%", "passed": True,
         "source": "common practice"},
        {"name": "plausibility", "value": 3.1, "limit": 8.0, "kind": "max", "unit": "K", "passed": True,
         "source": "Faiman (2008)"},
    ]
    _edit_summary(res, validity={"ok": False, "confidence_factor": 0.2, "checks": checks})
    html_text = _report(res)
    assert html_text.index('id="validity"') < html_text.index('id="overview"')
    banner = html_text.split('class="banner"', 1)[1].split("</div>", 1)[0]
    assert "registration" in banner and "weak fit: run pvscan align" in banner
    assert "coverage" not in banner  # only the failed ones
    block = _section(html_text, "validity")
    rows = re.findall(r"<tr class=\"(\w+)\">(.*?)</tr>", block, re.S)
    assert [c for c, _ in rows] == ["fail", "ok", "ok"]
    first = _text(rows[0][1])
    for part in ("registration", "0.08", "≥ 0.5", "pvscan registration", "fail", "weak fit"):
        assert part in first, part
    assert "≤ 5" in _text(rows[1][1]) and "%" in _text(rows[1][1])


def test_no_banner_on_a_valid_flight(tmp_path):
    res = build_result(tmp_path)
    _edit_summary(res, validity={"ok": True, "checks": [
        {"name": "irradiance_min", "value": 870, "limit": 600, "unit": "W/m2", "passed": True}]})
    html_text = _report(res)
    assert 'class="banner"' not in html_text
    assert "all checks passed" in html_text


def test_validity_absent(tmp_path):
    res = build_result(tmp_path)
    s = json.loads((res / "summary.json").read_text())
    s.pop("validity")
    (res / "summary.json").write_text(json.dumps(s))
    html_text = _report(res)
    assert "No validity record" in html_text and 'class="banner"' not in html_text


def test_registration_shown_when_present(tmp_path):
    res = build_result(tmp_path)
    _edit_summary(res, layout_shift_m=[0.2, -0.1], registration={
        "layout_shift_m": [0.2, -0.1], "rotation_deg": 0.5, "scale": 1.004, "residuals_m": {"median": 0.012,
                                                                                            "max": 0.04},
        "tables_refined": 2, "confidence": 0.93, "applied": True, "message": "fitted on 2 tables",
        "blocks": [{"x": 500008.0, "y": 5300008.0, "dx_m": 0.2, "dy_m": -0.1, "used": True}]})
    block = _section(_report(res), "validity")
    text = _text(block)
    for part in ("+0.20 m east, -0.10 m north", "0.500 °", "+0.400 %", "median 0.012 m", "tables refined 2",
                 "0.93", "fitted on 2 tables"):
        assert part in text, part
    assert 'alt="registration fit"' in block


def test_registration_absent_is_fine(tmp_path):
    res = build_result(tmp_path)
    block = _section(_report(res), "validity")
    assert "Layout fitted" not in block


def test_outlines_follow_rotation_and_scale():
    """A recorded rotation and scale are applied about the recorded centre, as
    shapely.affinity.rotate / scale do (the reference), then the shift."""
    from shapely.affinity import rotate, scale, translate
    from shapely.geometry import box

    from pvscan.report._geometry import registration_transform

    summary = {"layout_shift_m": [0.3, -0.2], "registration": {"rotation_deg": 1.5, "scale": 1.01,
                                                               "centre_m": [100.0, 50.0]}}
    tf, tables = registration_transform(summary)
    g = box(120.0, 60.0, 122.0, 61.0)
    ref = translate(rotate(scale(g, 1.01, 1.01, origin=(100.0, 50.0)), 1.5, origin=(100.0, 50.0)), 0.3, -0.2)
    got = np.asarray(g.exterior.coords)
    assert np.allclose(tf(got), np.asarray(ref.exterior.coords), atol=1e-9)
    assert tables == {}
    _, tables = registration_transform({"registration": {"tables": [{"table_id": "T01", "dx_m": 0.05,
                                                                     "dy_m": 0.0}]}})
    assert tables == {"T01": (0.05, 0.0)}


# ------------------------------------------------------------------ method, cautions, conditions
def test_method_notes_show_the_coefficients_the_run_used(tmp_path):
    res = build_result(tmp_path)
    _edit_summary(res, normalisation={"u0": 29.0, "u1": 0.0, "g_ref_w_m2": 1000.0, "wind_ref_m_s": 1.0})
    text = _text(_section(_report(res), "method"))
    assert "u0 = 29 W/(m²·K)" in text and "u1 = 0 W·s/(m³·K)" in text
    assert "25" not in re.findall(r"u0 = (\S+)", text)


def test_method_notes_say_when_coefficients_are_not_recorded(tmp_path):
    res = build_result(tmp_path)
    text = _text(_section(_report(res), "method"))
    assert "not recorded" in text and "u0 = 25" not in text


def test_cautions_listed_once(tmp_path):
    """The pipeline's own cautions (near-duplicates of the report's) are not repeated; a new
    one is kept; every hazard is covered once (common practice: live DC, arcs and fire, hot
    surfaces, qualified and licensed people under local codes, drone flights)."""
    from pvscan.report._text import SAFETY_CAUTIONS

    res = build_result(tmp_path)
    pipeline_cautions = [
        "PV modules and strings carry live DC voltage whenever light falls on them, even when the inverter or "
        "the string is disconnected; daylight alone energises them.",
        "Faulty connectors, junction boxes and bypass diodes can arc and start fires; DC arcs do not "
        "self-extinguish. Keep clear of damaged or smoking components and follow the site's emergency procedure.",
        "Hot spots and junction boxes can be hot enough to burn skin; let them cool or use suitable protective "
        "equipment before touching.",
        "Only qualified, authorised persons may open, test or repair PV electrical equipment, under the local "
        "electrical codes and the site's safety rules.",
        "Drone flights must follow the local aviation rules and the site's permissions; keep clear of people, "
        "overhead lines and operating equipment.",
        "Keep a fire extinguisher for electrical fires within reach during site work.",
    ]
    _edit_summary(res, safety=pipeline_cautions)
    html_text = _report(res)
    items = re.findall(r"<li>(.*?)</li>", _section(html_text, "safety"), re.S)
    assert len(items) == len(SAFETY_CAUTIONS) + 1
    assert sum("live" in i.lower() for i in items) == 1
    text = " ".join(items).lower()
    for word in ("live (dc)", "arc", "fire", "burn", "licensed", "local electrical codes", "aviation", "extinguisher"):
        assert word in text, word
    assert len(re.findall(r'class="cautions"', html_text)) == 1


def test_irradiance_change_in_percent(tmp_path):
    res = build_result(tmp_path)
    _edit_summary(res, conditions={"poa_global_w_m2": 870.0, "poa_global_change_pct": 4.2,
                                   "poa_global_std_w_m2": 3.0})
    rows = re.findall(r"<tr><td>(.*?)</td><td>(.*?)</td></tr>", _section(_report(res), "conditions"))
    values = dict(rows)
    assert values["irradiance change during flight"] == "4.20 %"
    assert values["irradiance (standard deviation)"] == "3.00 W/m²"


# ------------------------------------------------------------------ cards
def _card(html_text: str, anchor: str) -> str:
    return html_text.split(f'id="{anchor}"', 1)[1].split("</article>", 1)[0]


def test_card_says_why_with_the_rule_and_the_value(tmp_path):
    """The hot cell (normalised delta T 23.4 K) is repair under the pipeline's hot-cell rule;
    the rule's values are read from the pipeline settings, not repeated here."""
    from pvscan.io.settings import load_pipeline

    rules = load_pipeline()["severity"]
    res = build_result(tmp_path)
    html_text = _report(res)
    hot = next(k for k, c in enumerate(parse(html_text).cards) if "hot cell" in _card(html_text, c["id"]))
    why = _text(_card(html_text, f"a{hot + 1}").split('class="why">', 1)[1].split("</p>", 1)[0])
    dtn = PLANTED[0][4] * 1.3
    assert f"normalised ΔT {dtn:.1f} K" in why
    assert f"{float(rules['repair_hot_cell_delta_t_norm_k']):g} K repair rule" in why
    assert f"{float(rules['safety_delta_t_norm_k']):g} K safety rule" in why
    # a junction box over its safety rule
    from pvscan.report._text import severity_reason

    r = {"severity": "safety", "defect": "junction_box", "delta_t_norm_k": 23.0, "t_max_c": 70.0}
    assert "23.0 K, above the 20 K safety rule for junction boxes" in severity_reason(
        r, {"safety_junction_box_delta_t_norm_k": 20.0, "safety_t_max_c": 100.0})
    r = {"severity": "safety", "defect": "open_module", "delta_t_norm_k": 5.0, "t_max_c": 104.5}
    assert "104.5 °C, at or above the 100 °C safety rule" in severity_reason(r, {"safety_t_max_c": 100.0})
    r = {"severity": "monitor", "defect": "pid", "delta_t_norm_k": 0.1, "power_loss_w": 12.0}
    assert "loses 12 W at STC, below the 40 W repair rule for PID strings" in severity_reason(
        r, {"repair_pid_power_loss_w": 40.0})
    r = {"severity": "monitor", "defect": "soiling", "delta_t_norm_k": 2.0, "t_max_c": 50.0}
    assert "cleaning" in severity_reason(r, {"monitor_defects": ["soiling"]})


def test_card_and_work_list_carry_string_inverter_walk_order_and_geo_link(tmp_path):
    res = build_result(tmp_path)
    with open(res / "workorders.csv") as fh:
        rows = list(csv.DictReader(fh))
    walk = {"1": 3, "2": 1, "3": 2}
    for r in rows:
        r["walk_order"] = walk[r["priority"]]
        r["string_id"] = f"S-{r['table_id']}-1"
        r["inverter_id"] = "INV-2"
        r["combiner_id"] = ""
    with open(res / "workorders.csv", "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    html_text = _report(res)
    card = _card(html_text, "a1")
    text = _text(card)
    assert "string S-T02-1" in text and "inverter INV-2" in text and "walk order 3" in text
    assert "combiner" not in text  # empty values are left out
    geo = re.findall(r'href="(geo:[^"]+)"', card)
    assert geo == [f"geo:{float(rows[0]['lat']):.7f},{float(rows[0]['lon']):.7f}"]
    # the work list in walking order, with the priority number linking to the card
    wl = _section(html_text, "worklist")
    order = re.findall(r'data-label="#"><a class="ref" href="#a\d">(\d)</a>', wl)
    assert order == ["2", "3", "1"]
    assert len(re.findall(r'href="geo:', wl)) == len(PLANTED)


def test_work_list_falls_back_to_priority_order(tmp_path):
    wl = _section(_report(build_result(tmp_path)), "worklist")
    assert re.findall(r'href="#a\d">(\d)</a>', wl) == ["1", "2", "3"]
    assert "walking order" not in wl


def test_close_up_scale_reaches_the_hot_spot_maximum(tmp_path):
    """The close-up's colour scale tops at the hottest pixel of the affected region, read here
    straight from the GeoTIFF (rasterio) inside the region drawn on the card."""
    import rasterio
    from rasterio.mask import mask

    from pvscan.report._geometry import MapGeometry
    from pvscan.report._result import load_result

    res = build_result(tmp_path)
    html_text = _report(res)
    data = load_result(res)
    geo = MapGeometry(data, "EPSG:32632")
    with rasterio.open(tmp_path / "flight" / "thermal.tif") as ds:
        for k in range(len(data.anomalies)):
            vals, _ = mask(ds, [geo.anomalies[k]], crop=True, all_touched=True, filled=False)
            top = float(vals.compressed().max())
            card = _card(html_text, f"a{k + 1}")
            hi = float(re.search(r'<span class="ramp" title="colour scale"></span>(-?[\d.]+) °C', card).group(1))
            assert hi >= top - 0.05, (k, hi, top)  # printed with one decimal


# ------------------------------------------------------------------ map labels and print
def test_labels_do_not_collide():
    """Forty marks in a tight cluster: every label gets a box that overlaps no other label and
    no mark, inside the frame."""
    from pvscan.report._labels import place_labels

    rng = np.random.default_rng(test_seed())
    pts = 200.0 + rng.uniform(-40.0, 40.0, (40, 2))
    sizes = [(4.3 * len(str(i + 1)) + 3.0, 8.75) for i in range(40)]
    r = 4.0
    centres, free = place_labels(pts, sizes, mark_radius=r, frame=(0.0, 0.0, 400.0, 400.0))
    assert free.all()
    boxes = np.array([[cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2] for (cx, cy), (w, h) in zip(centres, sizes)])
    marks = np.column_stack([pts - r, pts + r])

    def overlap(a, b):
        return min(a[2], b[2]) - max(a[0], b[0]) > 1e-9 and min(a[3], b[3]) - max(a[1], b[1]) > 1e-9

    for i in range(40):
        assert not any(overlap(boxes[i], boxes[j]) for j in range(40) if j != i)
        assert not any(overlap(boxes[i], m) for m in marks)
        assert 0 <= boxes[i][0] and boxes[i][2] <= 400


def test_every_mark_is_numbered_by_default():
    from pvscan.io.settings import load_pipeline

    assert load_pipeline()["report"]["overview_labels"] >= 1000


def test_field_sheets_one_table_per_sheet(tmp_path):
    """Print: one field sheet per table, each holding only that table's findings, each sheet
    after the first starting a new page."""
    html_text = _report(build_result(tmp_path))
    block = _section(html_text, "sheets")
    sheets = re.findall(r'<div class="fieldsheet" id="sheet-\d+"><h3>Table (\S+) · (\d+) finding', block)
    tables = {}
    for i, _, _, _, _ in PLANTED:
        tid = "T01" if i < 12 else "T02"
        tables[tid] = tables.get(tid, 0) + 1
    assert {t: int(n) for t, n in sheets} == tables
    css = html_text.split("@media print", 1)[1]
    assert ".fieldsheet + .fieldsheet { break-before: page; }" in css
    assert math.isfinite(len(sheets))


def test_placement_record_is_applied():
    """registration.placement (shift_m, rotation_deg, scale, centre) as summary.json records the
    fit: x' = centre + s R(theta) (x - centre) + shift, checked against shapely.affinity."""
    from shapely.affinity import rotate, scale, translate
    from shapely.geometry import box

    from pvscan.report._geometry import registration_transform

    summary = {"layout_shift_m": [9.0, 9.0],  # superseded by the placement's own shift
               "registration": {"placement": {"shift_m": [-0.4, 0.25], "rotation_deg": -0.8, "scale": 0.995,
                                              "centre": [1000.0, 2000.0]}}}
    tf, _ = registration_transform(summary)
    g = box(1040.0, 1980.0, 1041.0, 1982.0)
    ref = translate(rotate(scale(g, 0.995, 0.995, origin=(1000.0, 2000.0)), -0.8, origin=(1000.0, 2000.0)),
                    -0.4, 0.25)
    assert np.allclose(tf(np.asarray(g.exterior.coords)), np.asarray(ref.exterior.coords), atol=1e-9)


def test_cell_grid_on_the_module():
    """A 6 x 12 cell module (CONTRACT.md's example) turned 30 degrees: 11 lines across its long
    side and 5 along it, each spanning the module, at equal spacing."""
    from shapely.affinity import rotate
    from shapely.geometry import box

    from pvscan.report._geometry import cell_lines

    m = rotate(box(0.0, 0.0, 1.038, 2.094), 30.0, origin=(0.0, 0.0))
    lines = cell_lines(m, 12, 6)
    assert len(lines) == 11 + 5
    lengths = sorted(round(ln.length, 6) for ln in lines)
    assert lengths[:11] == [1.038] * 11 and lengths[11:] == [2.094] * 5
    for ln in lines:
        assert m.buffer(1e-9).contains(ln)
    mids = sorted(ln.interpolate(0.5, normalized=True).distance(rotate(box(0, 0, 1.038, 0), 30.0, origin=(0, 0)))
                  for ln in lines[:11])
    assert np.allclose(np.diff(mids), 2.094 / 12, atol=1e-9)
