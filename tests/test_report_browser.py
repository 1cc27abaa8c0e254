"""report.html in a real browser: headless Chromium loads it from disk, offline.

Checks: no script error and no console error (the page carries a content-security policy that
forbids every fetch, so a reference to anything outside the file would show up as an error),
every image decodes in the browser, the anomaly cards are in the rendered DOM, and a screenshot
is not blank. Skipped only when Chromium is not installed and ``CI`` is not set: in CI (``.ci/run``
installs the Debian package) a missing Chromium fails these tests.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from conftest import test_seed
from test_report import PLANTED, build_result

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser") or (
    "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)

pytestmark = [pytest.mark.browser]


@pytest.fixture(autouse=True)
def _chromium_present():
    if CHROMIUM is None:
        if os.environ.get("CI"):
            pytest.fail("CI is set but headless Chromium is not installed (apt-get install chromium)")
        pytest.skip("headless Chromium is not installed")

_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
          "--disable-component-update", "--disable-sync", "--no-first-run", "--hide-scrollbars",
          "--disable-extensions", "--mute-audio", "--no-default-browser-check"]

# Collects script errors and image decoding results into the DOM (so --dump-dom shows them).
_PROBE = """<script>
window.__errors = [];
window.addEventListener('error', function (e) {
  window.__errors.push(String(e.message || (e.target && (e.target.src || e.target.tagName)) || 'error'));
}, true);
document.addEventListener('securitypolicyviolation', function (e) {
  window.__errors.push('csp: ' + e.violatedDirective + ' ' + e.blockedURI);
});
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var bad = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); }).length;
  var out = {errors: window.__errors, images: imgs.length, broken: bad,
             cards: document.querySelectorAll('article.card').length,
             width: document.documentElement.scrollWidth, viewport: window.innerWidth};
  var pre = document.createElement('pre');
  pre.id = 'probe-result';
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


def _run(args, tmp_path, name):
    profile = tmp_path / f"profile-{name}"
    cmd = [CHROMIUM, *_FLAGS, f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    from pvscan.report import write_report

    tmp = tmp_path_factory.mktemp("browser")
    return write_report(build_result(tmp))


def test_loads_without_errors_and_all_images_decode(report, tmp_path):
    html = report.read_text(encoding="utf-8")
    # the probe needs inline script: allow it in the probe copy only
    probe_html = html.replace("default-src 'none';", "default-src 'none'; script-src 'unsafe-inline';", 1)
    probe_html = probe_html.replace("</head>", _PROBE + "\n</head>", 1)
    probe = tmp_path / "probe.html"
    probe.write_text(probe_html, encoding="utf-8")
    r = _run(["--virtual-time-budget=5000", "--window-size=1280,900", "--dump-dom", probe.as_uri()],
             tmp_path, "probe")
    m = re.search(r'<pre id="probe-result">(.*?)</pre>', r.stdout, re.S)
    assert m, f"probe did not run; stderr: {r.stderr[-2000:]}"
    out = json.loads(m.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    assert out["errors"] == []
    assert out["broken"] == 0 and out["images"] == 1 + 4 + 2 * len(PLANTED)
    assert out["cards"] == len(PLANTED)
    # no horizontal scrolling at a laptop width
    assert out["width"] <= out["viewport"] + 1


def _console_errors(page: Path, tmp_path, name) -> list[str]:
    r = _run(["--enable-logging=stderr", "--v=0", "--virtual-time-budget=5000", "--dump-dom", page.as_uri()],
             tmp_path, name)
    assert "</html>" in r.stdout, r.stderr[-2000:]
    return [ln for ln in r.stderr.splitlines() if ":CONSOLE" in ln or "Uncaught" in ln]


def test_console_check_detects_errors(tmp_path):
    """The console scan itself can fail: a page with a script error is caught."""
    bad = tmp_path / "bad.html"
    bad.write_text('<!DOCTYPE html><html><head><meta charset="utf-8"><title>t</title></head><body>'
                   '<script>throw new Error("deliberate")</script></body></html>', encoding="utf-8")
    assert any("deliberate" in ln for ln in _console_errors(bad, tmp_path, "bad"))


def test_console_is_clean_and_screenshot_is_not_blank(report, tmp_path):
    from PIL import Image

    assert _console_errors(report, tmp_path, "console") == []
    shot = tmp_path / "report.png"
    r = _run(["--virtual-time-budget=5000", "--window-size=1280,2400", f"--screenshot={shot}", report.as_uri()],
             tmp_path, "shot")
    assert shot.exists(), r.stderr[-2000:]
    im = np.asarray(Image.open(shot).convert("RGB"), dtype=float)
    assert im.shape[0] >= 2000 and im.shape[1] == 1280
    # the page has a dark header band, a light body and a coloured map: many distinct tones
    assert im[:150].mean() < 110 and im[600:].mean() > 150
    assert np.unique((im[::7, ::7] // 16).reshape(-1, 3), axis=0).shape[0] > 40


def test_prints_to_a_few_pages(report, tmp_path):
    """Print layout: the report of three anomalies prints on a handful of A4 pages (the print
    style sheet drops the navigation and the scroll box and packs three cards per row)."""
    pdf = tmp_path / "report.pdf"
    r = _run(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", report.as_uri()], tmp_path, "pdf")
    assert pdf.exists(), r.stderr[-2000:]
    data = pdf.read_bytes()
    assert data[:5] == b"%PDF-"  # ISO 32000-1 file header
    pages = len(re.findall(rb"/Type\s*/Page(?![s\w])", data))
    assert 2 <= pages <= 8, pages


def test_no_horizontal_scrolling_on_a_narrow_screen(report, tmp_path):
    html = report.read_text(encoding="utf-8")
    probe_html = html.replace("default-src 'none';", "default-src 'none'; script-src 'unsafe-inline';", 1)
    probe = tmp_path / "probe.html"
    probe.write_text(probe_html.replace("</head>", _PROBE + "\n</head>", 1), encoding="utf-8")
    r = _run(["--virtual-time-budget=5000", "--window-size=500,900", "--dump-dom", probe.as_uri()],
             tmp_path, "narrow")
    m = re.search(r'<pre id="probe-result">(.*?)</pre>', r.stdout, re.S)
    assert m, r.stderr[-2000:]
    out = json.loads(m.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    assert out["errors"] == [] and out["width"] <= out["viewport"] + 1


_PHONE_PROBE = """<!DOCTYPE html><html><head><meta charset="utf-8"><style>body{margin:0}iframe{border:0}</style></head>
<body><iframe id="f" width="390" height="844" srcdoc="%s"></iframe>
<script>
document.getElementById('f').addEventListener('load', function () {
  var f = document.getElementById('f'), d = f.contentDocument, w = f.contentWindow;
  var wide = [];
  d.querySelectorAll('body *').forEach(function (e) {
    var r = e.getBoundingClientRect();
    if (r.width > 0 && r.right > w.innerWidth + 1) wide.push(e.tagName + '.' + e.className);
  });
  var map = d.querySelector('img.map'), rows = d.querySelectorAll('#worklist tbody tr');
  var rowsInside = Array.prototype.every.call(rows, function (r) {
    var b = r.getBoundingClientRect(); return b.left >= 0 && b.right <= w.innerWidth + 1; });
  var pins = Array.prototype.map.call(d.querySelectorAll('a.pin'), function (a) {
    var b = a.getBoundingClientRect(); return Math.min(b.width, b.height); });
  var p = document.createElement('pre'); p.id = 'probe-result';
  p.textContent = JSON.stringify({width: d.documentElement.scrollWidth, viewport: w.innerWidth,
    wide: wide.slice(0, 20), map: map ? map.getBoundingClientRect().width : 0, rows: rows.length,
    rowsInside: rowsInside, pins: pins, cards: d.querySelectorAll('article.card').length});
  document.body.appendChild(p);
});
</script></body></html>"""


def _phone(report_path: Path, tmp_path, name):
    """The report in a 390 px wide frame (a phone held upright; headless Chromium will not
    make its window narrower than 500 px, a frame can be)."""
    import html as _html

    page = tmp_path / f"{name}.html"
    page.write_text(_PHONE_PROBE % _html.escape(report_path.read_text(encoding="utf-8"), quote=True),
                    encoding="utf-8")
    r = _run(["--virtual-time-budget=8000", "--window-size=800,900", "--dump-dom", page.as_uri()], tmp_path, name)
    m = re.search(r'<pre id="probe-result">(.*?)</pre>', r.stdout, re.S)
    assert m, r.stderr[-2000:]
    return json.loads(m.group(1).replace("&quot;", '"').replace("&amp;", "&"))


@pytest.fixture(scope="module")
def simulated_report(tmp_path_factory):
    """A simulated flight (pvscan.simulate, seed from PVSCAN_TEST_SEED) through pvscan inspect."""
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    seed = test_seed()
    d = tmp_path_factory.mktemp("phone")
    sc = {"site": {"name": "Test field Sedge Hollow (invented)", "lon": 9.2, "lat": 48.1},
          "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 10, "rotation_deg": 8.0,
                    "modules_per_string": 10},
          "layout": {"features": "modules", "offset_m": [0.3, -0.2]},
          "defects": {"open_module": 1, "bypassed_substring": 1, "hot_cell": 3, "junction_box": 1,
                      "several_hot_cells": 1, "several_bypassed_substrings": 1, "open_string": 1, "pid": 0,
                      "soiling": 1}}
    sim = simulate_flight(sc, d / "flight", seed=seed)
    inspect_flight(sim.manifest, out_dir=d / "result", report=True)
    return d / "result" / "report.html"


def test_phone_width_simulated_flight(simulated_report, tmp_path):
    """At 390 px nothing is wider than the screen (the document does not scroll sideways and no
    box inside it spills), the map spans the screen, every work-list row fits and the map's
    links stay big enough to tap (common practice: at least ~16 px)."""
    out = _phone(simulated_report, tmp_path, "phone-sim")
    assert out["viewport"] == 390
    assert out["width"] <= out["viewport"], out
    assert out["wide"] == [], out["wide"]
    assert out["map"] >= 300
    assert out["rows"] == out["cards"] >= 1 and out["rowsInside"]
    assert out["pins"] and min(out["pins"]) >= 16


def test_phone_width_check_detects_a_spill(report, tmp_path):
    """The phone check can fail: a page with a 600 px wide table spills."""
    bad = tmp_path / "wide.html"
    bad.write_text(report.read_text(encoding="utf-8").replace(
        "<main class=\"page\">", "<main class=\"page\"><table style=\"width:600px\"><tr><td>x</td></tr></table>", 1),
        encoding="utf-8")
    out = _phone(bad, tmp_path, "phone-bad")
    assert out["width"] > out["viewport"] or out["wide"]


def test_print_one_page_per_table(report, tmp_path):
    """Printed, each table's field sheet starts on its own page: the PDF has at least one page
    for the summary plus one per table (2 here)."""
    pdf = tmp_path / "sheets.pdf"
    _run(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", report.as_uri()], tmp_path, "pdf-sheets")
    pages = len(re.findall(rb"/Type\s*/Page(?![s\w])", pdf.read_bytes()))
    assert pages >= 1 + 2
