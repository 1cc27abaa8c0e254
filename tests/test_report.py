"""Tests of the inspection report (pvscan.report) and the CLI end-of-run summary.

The fixture builds a small result folder following the output contract: an invented plant of
24 portrait modules in two tables (UTM zone 32N), a thermal GeoTIFF at 5 cm/px with three
planted anomalies (one hot cell, one bypassed substring, one open module), and the four
result files that ``pvscan inspect`` writes.
"""
from __future__ import annotations

import base64
import csv
import io
import json
import math
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

CRS = "EPSG:32632"
GSD = 0.05  # [m/px]
X0, Y0 = 500_000.0, 5_300_000.0  # south-west corner of the ortho [m], UTM 32N
MOD_W, MOD_L = 1.0, 2.0  # module short / long side [m] (portrait: long side north-south)
BACKGROUND_C, MODULE_C = 28.0, 41.0  # apparent ground / healthy module temperature [degC]


def _module_boxes():
    """(module_id, table_id, row, col, (x0, y0, x1, y1)) of 2 tables x 1 row x 12 modules."""
    out = []
    for t in range(2):
        ty = Y0 + 4.0 + t * 6.0
        for c in range(12):
            x = X0 + 3.0 + c * (MOD_W + 0.05)
            out.append((f"T{t + 1:02d}-R1-C{c + 1:02d}", f"T{t + 1:02d}", 1, c + 1,
                        (x, ty, x + MOD_W, ty + MOD_L)))
    return out


# anomaly planted: (module index, defect, severity, region box in local fractions (u0,u1,v0,v1)
# with u along the long side from the lower (south) edge and v across from the west side, rise [K])
PLANTED = [
    (5, "hot_cell", "repair", (0.5, 0.5833, 0.3333, 0.5), 18.0),
    (14, "bypassed_substring", "repair", (0.0, 1.0, 0.0, 0.3333), 6.0),
    (20, "open_module", "safety", (0.0, 1.0, 0.0, 1.0), 9.0),
]


def _region_box(box, uv):
    x0, y0, x1, y1 = box
    u0, u1, v0, v1 = uv
    return (x0 + v0 * (x1 - x0), y0 + u0 * (y1 - y0), x0 + v1 * (x1 - x0), y0 + u1 * (y1 - y0))


def build_result(tmp_path: Path, *, n_extra: int = 0, with_ortho: bool = True, kelvin: bool = False,
                 seed: int = 7, series: bool = False) -> Path:
    """Write a result folder (and its thermal ortho) under ``tmp_path``; return the folder.

    ``n_extra`` adds that many monitor-level hot cells (for long-list tests).
    """
    import rasterio
    import shapely
    from affine import Affine
    from pyproj import Transformer
    from shapely.geometry import box as sbox
    from shapely.geometry import mapping

    rng = np.random.default_rng(seed)
    width, height = int(20.0 / GSD), int(16.0 / GSD)
    img = BACKGROUND_C + rng.normal(0.0, 0.4, (height, width))
    tr = Affine(GSD, 0.0, X0, 0.0, -GSD, Y0 + height * GSD)
    mods = _module_boxes()

    def px(b):
        c0, c1 = int(round((b[0] - X0) / GSD)), int(round((b[2] - X0) / GSD))
        r0, r1 = int(round((Y0 + height * GSD - b[3]) / GSD)), int(round((Y0 + height * GSD - b[1]) / GSD))
        return slice(r0, r1), slice(c0, c1)

    for _, _, _, _, b in mods:
        img[px(b)] = MODULE_C + rng.normal(0.0, 0.3, img[px(b)].shape)
    planted = list(PLANTED)
    for k in range(n_extra):
        i = [m for m in range(len(mods)) if m not in (5, 14, 20)][k % 21]
        planted.append((i, "hot_cell", "monitor", (0.1 + 0.05 * (k % 8), 0.1833 + 0.05 * (k % 8), 0.0, 0.1667),
                        3.0 + 0.1 * k))
    for i, _, _, uv, rise in planted:
        img[px(_region_box(mods[i][4], uv))] += rise
    img[:6, :6] = -9999.0  # a nodata corner
    out_tif = tmp_path / "flight" / "thermal.tif"
    out_tif.parent.mkdir(parents=True, exist_ok=True)
    data = (img + 273.15).astype(np.float32) if kelvin else img.astype(np.float32)
    data[:6, :6] = -9999.0
    with rasterio.open(out_tif, "w", driver="GTiff", width=width, height=height, count=1, dtype="float32",
                       crs=CRS, transform=tr, nodata=-9999.0, tiled=True, blockxsize=128,
                       blockysize=128) as ds:
        ds.write(data, 1)

    to_ll = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform

    def lonlat(geom):
        return shapely.transform(geom, lambda xy: np.column_stack(to_ll(xy[:, 0], xy[:, 1])))

    def ll(geom):
        return mapping(lonlat(geom))

    res = tmp_path / "result"
    res.mkdir()
    defect_of = {p[0]: p for p in planted}
    feats = []
    for i, (mid, tid, row, col, b) in enumerate(mods):
        p = defect_of.get(i)
        t_med = MODULE_C + 2.0 + (p[4] if p and p[1] == "open_module" else 0.0)
        feats.append({"type": "Feature", "geometry": ll(sbox(*b)), "properties": {
            "module_id": mid, "table_id": tid, "table_row": row, "table_col": col,
            "t_mean_c": t_med, "t_median_c": t_med, "t_p95_c": t_med + 1.0, "t_max_c": t_med + 2.0,
            "t_min_c": t_med - 1.0, "t_std_k": 0.4, "valid_fraction": 1.0, "reference_c": MODULE_C + 2.0,
            "delta_t_k": t_med - MODULE_C - 2.0, "delta_t_norm_k": (t_med - MODULE_C - 2.0) * 1.3,
            "defect": p[1] if p else None, "power_loss_w": 0.0 if not p else 10.0}})
    (res / "modules.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": feats}))
    # anomalies ranked: safety first, then by loss
    rows = []
    for i, defect, sev, uv, rise in planted:
        loss = {"hot_cell": 12.0 + rise, "bypassed_substring": 136.7, "open_module": 410.0}[defect]
        rows.append(dict(module_index=i, defect=defect, severity=sev, uv=uv, rise=rise, loss=loss))
    order = sorted(rows, key=lambda r: (("safety", "repair", "monitor").index(r["severity"]), -r["loss"]))
    a_feats, w_rows = [], []
    for prio, r in enumerate(order, start=1):
        mid, tid, row, col, b = mods[r["module_index"]]
        region = sbox(*_region_box(b, r["uv"]))
        c = lonlat(region).centroid
        aid = f"A{prio:04d}"
        action = {"safety": "Isolate the string and inspect the module and its connectors",
                  "repair": "Replace the module or its bypass diode at the next service visit",
                  "monitor": "Check again at the next flight"}[r["severity"]]
        props = {"anomaly_id": aid, "module_id": mid, "module_ids": [mid], "defect": r["defect"],
                 "severity": r["severity"], "delta_t_k": r["rise"], "delta_t_norm_k": round(r["rise"] * 1.3, 3),
                 "t_max_c": MODULE_C + 2.0 + r["rise"], "power_loss_w": r["loss"],
                 "energy_loss_kwh_per_year": r["loss"] * 1.15, "priority": prio, "confidence": 0.9,
                 "table_id": tid, "action": action}
        a_feats.append({"type": "Feature", "geometry": ll(region), "properties": props})
        w_rows.append({"priority": prio, "anomaly_id": aid, "module_id": mid, "table_id": tid,
                       "table_row": row, "table_col": col, "defect": r["defect"], "severity": r["severity"],
                       "action": action, "delta_t_k": r["rise"], "delta_t_norm_k": round(r["rise"] * 1.3, 3),
                       "power_loss_w": r["loss"], "energy_loss_kwh_per_year": r["loss"] * 1.15,
                       "lon": round(c.x, 7), "lat": round(c.y, 7)})
    # the file order is not the priority order: the report must sort
    (res / "anomalies.geojson").write_text(json.dumps({"type": "FeatureCollection",
                                                       "features": a_feats[::-1]}))
    with open(res / "workorders.csv", "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(w_rows[0]))
        w.writeheader()
        w.writerows(w_rows)
    by_def, by_sev = {}, {}
    for r in rows:
        by_def[r["defect"]] = by_def.get(r["defect"], 0) + 1
        by_sev[r["severity"]] = by_sev.get(r["severity"], 0) + 1
    summary = {
        "pvscan_version": "0.1.0", "pipeline": None,
        "site": {"name": "Hollowmere Solar Field (demo)"},
        "flight": {"id": "HM-2026-06-14-A", "start": "2026-06-14T10:40:00+02:00",
                   "end": "2026-06-14T11:25:00+02:00"},
        "inputs": {"files": [str(out_tif) if with_ortho else str(tmp_path / "gone.tif")], "crs": CRS,
                   "gsd_m": GSD},
        "conditions": {"poa_global": 870.0, "temp_air": 26.5, "wind_speed": 2.1, "temp_sky": -12.0},
        "validity": {"ok": False, "checks": [
            {"name": "poa_global_min", "value": 870.0, "limit": 600.0, "unit": "W/m2", "passed": True,
             "source": "IEC TS 62446-3"},
            {"name": "wind_speed_max", "value": 2.1, "limit": 7.8, "unit": "m/s", "passed": True,
             "source": "IEC TS 62446-3 (from memory)"},
            {"name": "irradiance_change_max", "value": 14.0, "limit": 10.0, "unit": "%", "passed": False,
             "source": "common practice"},
        ]},
        "counts": {"modules": len(mods), "anomalies": len(rows), "by_defect": by_def, "by_severity": by_sev},
        "loss": {"power_loss_w": sum(r["loss"] for r in rows)},
        "power_loss_w": sum(r["loss"] for r in rows),
        "layout_shift_m": [0.0, 0.0],
        "safety": ["Keep a fire extinguisher for electrical fires within reach during site work."],
        "image_artefacts": {"levelling": True, "levelled_modules": 3, "stretches": [
            {"modules": ["T01-R2-C04", "T01-R2-C05", "T01-R2-C06"], "offset_k": 1.4, "reason": "strings"}]},
    }
    if kelvin or series:
        summary["inputs"]["manifest"] = str(_write_manifest(tmp_path / "flight", kelvin=kelvin, series=series))
    (res / "summary.json").write_text(json.dumps(summary, indent=1))
    return res


def _write_manifest(folder: Path, kelvin: bool, series: bool = False) -> Path:
    text = f"""[site]
name = "Hollowmere Solar Field (demo)"

[flight]
orthos = ["thermal.tif"]
layout = "layout.geojson"
start = "2026-06-14T10:40:00+02:00"
end = "2026-06-14T11:25:00+02:00"

[ortho]
units = "{'kelvin' if kelvin else 'celsius'}"

[conditions]
{'series = "weather.csv"' if series else 'poa_irradiance_w_m2 = 870.0'}
{'' if series else 'ambient_c = 26.5'}
{'' if series else 'wind_m_s = 2.1'}

[module]
pmax_w = 410.0
gamma_pmax_pct_per_k = -0.35
width_m = 1.0
length_m = 2.0
cells_across = 6
cells_along = 12
bypass_diodes = 3
emissivity = 0.85
"""
    (folder / "layout.geojson").write_text('{"type": "FeatureCollection", "features": []}')
    if series:
        rows = ["time,poa_irradiance_w_m2,ambient_c,wind_m_s"]
        for k in range(10):
            rows.append(f"2026-06-14T10:{40 + 5 * k // 60:02d}:{(5 * k) % 60:02d}+02:00,"
                        f"{870 - 30 * k:.1f},26.5,{2.0 + 0.1 * k:.2f}")
        (folder / "weather.csv").write_text("\n".join(rows) + "\n")
    p = folder / "flight.toml"
    p.write_text(text)
    return p


# ------------------------------------------------------------------ HTML helpers
class _Collector(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.imgs, self.links, self.cards, self.scripts, self.ids = [], [], [], 0, set()
        self.text = []
        self._in_style = False
        self.styles = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        if tag == "img":
            self.imgs.append(a)
        if tag in ("a", "link") and "href" in a:
            self.links.append(a["href"])
        if tag == "article" and "card" in (a.get("class") or ""):
            self.cards.append(a)
        if tag == "script":
            self.scripts += 1
        if tag == "style":
            self._in_style = True

    def handle_endtag(self, tag):
        if tag == "style":
            self._in_style = False

    def handle_data(self, data):
        (self.styles if self._in_style else self.text).append(data)


def parse(html_text: str) -> _Collector:
    c = _Collector()
    c.feed(html_text)
    return c


def decode_png(uri: str):
    from PIL import Image

    assert uri.startswith("data:image/png;base64,"), uri[:40]
    raw = base64.b64decode(uri.split(",", 1)[1], validate=True)
    assert raw[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, ISO/IEC 15948 section 5.2
    im = Image.open(io.BytesIO(raw))
    im.load()
    return im


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    return build_result(tmp_path_factory.mktemp("report"))


@pytest.fixture(scope="module")
def report_html(result):
    from pvscan.report import write_report

    path = write_report(result)
    assert path == result / "report.html"
    return path.read_text(encoding="utf-8")


# ------------------------------------------------------------------ structure
def test_every_anomaly_has_a_card_in_priority_order(result, report_html):
    doc = parse(report_html)
    ids = [c["data-anomaly"] for c in doc.cards]
    prios = [int(c["data-priority"]) for c in doc.cards]
    with open(result / "workorders.csv") as fh:
        wo = list(csv.DictReader(fh))
    assert len(doc.cards) == len(wo) == len(PLANTED)
    assert prios == sorted(prios) == [int(r["priority"]) for r in wo]
    assert ids == [r["anomaly_id"] for r in wo]
    # the safety anomaly (open module) comes first
    assert "open module" in report_html.split('id="a1"')[1].split("</article>")[0]
    # every work-list link lands on a card
    for href in doc.links:
        if href.startswith("#"):
            assert href[1:] in doc.ids, href


def test_every_embedded_image_decodes(report_html):
    doc = parse(report_html)
    # overview, 4 plots, 3 cards x 2 crops
    assert len(doc.imgs) == 1 + 4 + 3 * 2
    sizes = []
    for a in doc.imgs:
        im = decode_png(a["src"])
        assert im.size[0] > 0 and im.size[1] > 0
        assert a.get("alt"), "every image has alt text"
        sizes.append(im.size)
    crops = [decode_png(a["src"]).size for a in doc.imgs if "crop" in (a.get("class") or "")]
    assert len(crops) == 6
    assert all(max(s) <= 200 and max(s) >= 100 for s in crops), crops


def test_no_external_urls_and_no_script(report_html):
    doc = parse(report_html)
    assert doc.scripts == 0
    for a in doc.imgs:
        assert a["src"].startswith("data:image/png;base64,")
    for href in doc.links:  # in-page links, or a position for a map app (geo URI, RFC 5870)
        assert href.startswith("#") or re.fullmatch(r"geo:-?\d+\.\d+,-?\d+\.\d+", href), href
    lowered = report_html.lower()
    assert "http:" not in lowered and "https:" not in lowered
    assert not re.search(r"""(src|href)\s*=\s*["']?//""", lowered)
    assert "@import" not in lowered and "url(" not in "".join(doc.styles).lower()


def test_cautions_and_method_present(report_html):
    text = " ".join(parse(report_html).text).lower()
    for phrase in ("live (dc)", "even when the inverter or the string is disconnected", "arc",
                   "fire", "burn", "qualified", "local electrical codes", "aviation rules"):
        assert phrase in text, phrase
    # the site's own caution from summary.json is carried over too
    assert "fire extinguisher" in text
    # method notes name the published models (Planck, Faiman) and the standard
    for phrase in ("planck", "faiman", "iec ts 62446-3", "apparent"):
        assert phrase in text, phrase


def test_levelled_image_artefacts_are_listed(report_html):
    # the reader must see which temperatures pvscan moved before judging them
    assert "Image artefacts" in report_html
    assert "T01-R2-C04 to T01-R2-C06 (3 modules): 1.4 K, crosses a string boundary" in report_html


def test_validity_block_shows_failed_check(report_html):
    text = " ".join(parse(report_html).text)
    assert "limits not met" in text
    assert "irradiance change max" in text
    # 14 % against a 10 % maximum: the failing verdict appears in the checks table
    row = report_html.split("irradiance change max")[-1].split("</tr>")[0]
    assert "fail" in row


def test_card_facts_match_the_result(result, report_html):
    with open(result / "workorders.csv") as fh:
        first = next(csv.DictReader(fh))
    card = report_html.split('id="a1"')[1].split("</article>")[0]
    assert first["module_id"] in card
    assert f"{float(first['lat']):.6f}, {float(first['lon']):.6f}" in card
    assert "position" in card and "table T02" in card
    assert "410 W" in card  # power loss of the open module [W]


def test_crop_outlines_the_planted_region(tmp_path):
    """The close-up is centred on the module and the hot region is where it was planted."""
    from pvscan.report._images import IDX_REGION, Palette, render_crop

    pal = Palette("inferno")
    # 40 x 20 px module at 1 px = 1 m, hot strip in the left third
    vals = np.full((40, 20), 40.0)
    vals[:, :7] = 46.0
    from shapely.geometry import box

    png = render_crop(vals, (0, 20, 0, 40), pal, 39.0, 47.0, 160, modules=[box(0, 0, 20, 40)],
                      regions=[box(0, 0, 20 / 3, 40)])
    from PIL import Image

    im = Image.open(io.BytesIO(png))
    assert im.mode == "P" and max(im.size) == 160
    idx = np.asarray(im)
    cols = np.where((idx == IDX_REGION).any(axis=0))[0]
    # region outline spans x = 0 .. 20/3 m -> 0 .. 26.7 px at 4 px/m (the line is 1-2 px wide)
    assert cols.min() <= 2 and 24 <= cols.max() <= 29
    # the hot strip is brighter than the rest in the colour map (inferno increases in lightness)
    hot, cool = np.median(idx[60:100, 8:20]), np.median(idx[60:100, 40:72])
    assert hot > cool


def test_colour_map_is_perceptually_ordered():
    """inferno/magma/cividis rise monotonically in lightness (matplotlib's documentation of its
    perceptually uniform maps); checked here with CIE L* from sRGB (IEC 61966-2-1 transfer curve,
    CIE 1976 L*)."""
    import matplotlib

    from pvscan.io.settings import load_pipeline

    name = load_pipeline()["report"]["colormap"]
    rgb = np.asarray(matplotlib.colormaps[name](np.linspace(0, 1, 64)))[:, :3]
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    y = lin @ np.array([0.2126, 0.7152, 0.0722])  # ITU-R BT.709 luminance weights
    lstar = np.where(y > (6 / 29) ** 3, 116 * np.cbrt(y) - 16, y * (29 / 3) ** 3)
    assert np.all(np.diff(lstar) > 0)


def test_scale_bar_lengths():
    from pvscan.report._figures import nice_length

    assert nice_length(37.0) == 20.0
    assert nice_length(8.0) == 5.0
    assert nice_length(1.0) == 1.0
    assert nice_length(0.31) == pytest.approx(0.2)


def test_north_arrow_follows_grid_convergence(result):
    """In transverse Mercator the grid convergence is gamma ~ (lon - lon0) * sin(lat) to first order
    (Snyder 1987, Map Projections - A Working Manual, USGS PP 1395; formula from memory). East of
    the central meridian grid north lies east of true north, so true north points left of map up."""
    from pvscan.report._build import _MapGeometry
    from pvscan.report._result import load_result

    data = load_result(result)
    # shift the whole plant 3 degrees east of zone 32's central meridian (9 E)
    import pandas as pd
    from shapely.affinity import translate

    data.modules["geometry"] = [translate(g, 3.0, 0.0) for g in data.modules["geometry"]]
    data.anomalies = data.anomalies.iloc[0:0]
    geo = _MapGeometry(data, CRS)
    lat = float(np.mean([g.centroid.y for g in data.modules["geometry"]]))
    lon = float(np.mean([g.centroid.x for g in data.modules["geometry"]]))
    expected = -(lon - 9.0) * math.sin(math.radians(lat))
    assert geo.north_deg() == pytest.approx(expected, abs=0.05)
    assert isinstance(data.modules, pd.DataFrame)


def test_validity_checks_normalised():
    from pvscan.report import validity_checks

    checks, ok = validity_checks({"validity": {"checks": {
        "poa": {"value": 500, "limit": 600, "passed": False, "unit": "W/m2", "source": "IEC TS 62446-3"},
        "wind": {"value": 3, "max": 8, "ok": True}}}})
    assert ok is False
    assert [c["name"] for c in checks] == ["poa", "wind"]
    assert checks[0]["kind"] == "min"  # failing below the limit: a minimum
    assert checks[1]["kind"] == "max" and checks[1]["passed"] is True


def test_report_without_ortho_still_builds(tmp_path):
    from pvscan.report import write_report

    res = build_result(tmp_path, with_ortho=False)
    html_text = write_report(res, tmp_path / "r.html").read_text()
    doc = parse(html_text)
    assert len(doc.cards) == len(PLANTED)
    assert "thermal ortho not found" in html_text.lower()
    # each card carries a plan of the module with the affected region instead of crops
    plans = [a for a in doc.imgs if "plan" in (a.get("class") or "")]
    assert len(plans) == len(PLANTED)
    assert "module median temperature" in " ".join(doc.text).lower() or len(doc.imgs) >= 5
    for a in doc.imgs:
        decode_png(a["src"])


def test_kelvin_ortho_is_shown_in_celsius(tmp_path):
    """A kelvin export is read through the manifest's [ortho] units: the colour windows are
    in degC (T[degC] = T[K] - 273.15, the definition of the Celsius scale)."""
    from pvscan.report import write_report

    res = build_result(tmp_path, kelvin=True)
    html_text = write_report(res).read_text()
    lows = [float(x) for x in re.findall(r'<span class="scale">(-?[\d.]+)<span class="ramp"', html_text)]
    assert lows, "colour windows printed"
    assert all(0.0 < v < 80.0 for v in lows), lows


def test_long_lists_keep_the_file_small(tmp_path):
    from pvscan.report import write_report

    res = build_result(tmp_path, n_extra=160)
    path = write_report(res, settings={"many_anomalies": 100})
    doc = parse(path.read_text())
    assert len(doc.cards) == len(PLANTED) + 160
    crops = [decode_png(a["src"]).size for a in doc.imgs if "crop" in (a.get("class") or "")]
    assert max(max(s) for s in crops) <= 120
    # ~ 2 crops of a few kB per card: the whole file stays below 8 MB
    assert path.stat().st_size < 8e6


def test_missing_result_file_is_a_clear_error(tmp_path):
    from pvscan.errors import OutputError
    from pvscan.report import write_report

    res = build_result(tmp_path)
    (res / "anomalies.geojson").unlink()
    with pytest.raises(OutputError, match="anomalies.geojson"):
        write_report(res)
    assert not (res / "report.html").exists()


def test_report_command(result, tmp_path):
    from click.testing import CliRunner

    from pvscan.cli.main import cli

    out = tmp_path / "again.html"
    r = CliRunner().invoke(cli, ["report", str(result), "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert out.exists() and str(out) in r.output
    r = CliRunner().invoke(cli, ["report", str(tmp_path / "nowhere")])
    assert r.exit_code != 0
    assert "nowhere" in r.output and "Traceback" not in r.output


def test_summary_fits_one_screen(result):
    import click
    from click.testing import CliRunner

    from pvscan.cli._summary import print_inspection_summary

    @click.command()
    def show():
        print_inspection_summary(result)

    r = CliRunner().invoke(show, [])
    assert r.exit_code == 0, r.output
    lines = r.output.rstrip("\n").split("\n")
    assert len(lines) <= 32
    assert max(len(s) for s in lines) <= 100
    text = r.output.lower()
    assert "open module" in text and "bypassed substring" in text
    # totals: 410 + 136.7 + 30 W = 576.7 W at STC
    assert "577 w" in text
    assert "irradiance change max" in text  # the failed validity check is shown
    assert "report.html" in text or "workorders.csv" in text
    assert "live" in text and "qualified" in text
    assert "image artefacts levelled: 1 row stretch, 3 modules" in text
    # the top work order comes first
    top = [s for s in lines if s.strip().startswith("1 ")]
    assert top and "T02-R1-C09" in top[0]


def test_close_up_window_keeps_module_texture_and_saturates_hot_spots():
    """The module median sits at the configured level of the window; a 35 K hot spot saturates
    instead of squeezing the module into the bottom colours; a uniform module gets the minimum
    span (its noise is not stretched)."""
    from pvscan.report._images import module_window

    rng = np.random.default_rng(3)
    body = 40.0 + rng.normal(0.0, 0.3, 5000)
    spot = np.concatenate([body, np.full(40, 75.0)])
    lo, hi = module_window(spot, percentile_hi=99.8, median_level=0.35, max_rise=12.0, min_span=4.0)
    med = float(np.median(spot))
    assert (med - lo) / (hi - lo) == pytest.approx(0.35, abs=1e-9)
    assert hi == pytest.approx(med + 12.0) and hi < 75.0
    lo, hi = module_window(body, percentile_hi=99.8, median_level=0.35, max_rise=12.0, min_span=4.0)
    assert hi - lo == pytest.approx(4.0)
    assert all(math.isnan(x) for x in module_window(np.array([np.nan]), percentile_hi=99.8,
                                                    median_level=0.35, max_rise=12.0, min_span=4.0))


def test_close_up_window_level_from_neighbours():
    """An open module is warm all over: the healthy neighbours set the level, so the faulty
    module shows above it instead of being centred in the window."""
    from pvscan.report._images import module_window

    rng = np.random.default_rng(5)
    healthy = 40.0 + rng.normal(0.0, 0.3, 8000)
    faulty = 45.0 + rng.normal(0.0, 0.3, 1000)
    lo, hi = module_window(np.concatenate([healthy, faulty]), top_values=faulty, percentile_hi=99.8,
                           median_level=0.35, max_rise=12.0, min_span=4.0)
    assert (np.median(faulty) - lo) / (hi - lo) > 0.8
    assert (np.median(healthy) - lo) / (hi - lo) == pytest.approx(0.35, abs=0.02)


# ------------------------------------------------------------------ end to end
@pytest.fixture(scope="module")
def inspected(tmp_path_factory):
    """A simulated flight (pvscan.simulate) through pvscan inspect, with the layout drawn
    0.5 m east / 0.3 m south of the plant so the map must draw the registered positions."""
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    d = tmp_path_factory.mktemp("e2e")
    none = {k: 0 for k in ("several_hot_cells", "several_bypassed_substrings", "open_string", "pid", "soiling")}
    sc = {"site": {"name": "Test field Alder Reach (invented)", "lon": 11.37, "lat": 47.26},
          "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 8, "rotation_deg": 12.0,
                    "modules_per_string": 8},
          "layout": {"features": "modules", "offset_m": [0.5, -0.3]},
          "defects": {"open_module": 1, "bypassed_substring": 1, "hot_cell": 2, "junction_box": 1, **none}}
    sim = simulate_flight(sc, d / "flight", seed=11)
    inspect_flight(sim.manifest, out_dir=d / "result", report=True)
    return sim, d / "result"


@pytest.mark.slow
def test_report_of_a_simulated_flight(inspected):
    _, out = inspected
    html_text = (out / "report.html").read_text(encoding="utf-8")
    doc = parse(html_text)
    feats = json.loads((out / "anomalies.geojson").read_text())["features"]
    assert len(feats) >= 1
    by_prio = sorted(feats, key=lambda f: f["properties"]["priority"])
    assert [c["data-anomaly"] for c in doc.cards] == [f["properties"]["anomaly_id"] for f in by_prio]
    for a in doc.imgs:
        decode_png(a["src"])
    assert sum("crop" in (a.get("class") or "") for a in doc.imgs) == 2 * len(feats)
    assert "thermal crop unavailable" not in html_text


@pytest.mark.slow
def test_map_draws_modules_where_the_simulator_put_them(inspected):
    """Result geometries keep the layout's positions, which the simulator drew offset from the
    plant in the image by truth.json's layout_offset_m; the report must draw modules at
    layout - offset, i.e. shifted by the registered layout_shift_m. Checked against the
    simulator's own offset: drawn centroids within 0.1 m (two pixels at 5 cm/px) of the image
    positions, while the unshifted layout is |offset| ~ 0.58 m away."""
    import geopandas as gpd

    from pvscan.report._build import _MapGeometry
    from pvscan.report._result import load_result

    sim, out = inspected
    offset = np.array(json.loads(Path(sim.truth_json).read_text())["layout_offset_m"], dtype=float)
    data = load_result(out)
    crs = json.loads((out / "summary.json").read_text())["inputs"]["crs"]
    geo = _MapGeometry(data, crs)
    truth = gpd.read_file(sim.truth).to_crs(crs).set_index("module_id")
    drawn = np.array([[g.centroid.x, g.centroid.y] for g in geo.modules])
    layout_xy = np.array([[truth.geometry[m].centroid.x, truth.geometry[m].centroid.y]
                          for m in data.modules["module_id"]])
    in_image = layout_xy - offset
    assert np.median(np.hypot(*(drawn - in_image).T)) < 0.1
    assert np.median(np.hypot(*(drawn - layout_xy).T)) == pytest.approx(float(np.hypot(*offset)), abs=0.05)
    # the same with the modules frame the pipeline hands over (layout positions, ortho CRS)
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight

    frame = read_layout(load_flight(sim.manifest), crs)
    geo2 = _MapGeometry(data, crs, frame)
    drawn2 = np.array([[g.centroid.x, g.centroid.y] for g in geo2.modules])
    assert np.median(np.hypot(*(drawn2 - in_image).T)) < 0.1


@pytest.mark.slow
def test_summary_of_a_simulated_flight(inspected):
    from pvscan.cli._summary import summary_lines

    _, out = inspected
    lines = summary_lines(out)
    assert len(lines) <= 32
    feats = json.loads((out / "anomalies.geojson").read_text())["features"]
    first = min(feats, key=lambda f: f["properties"]["priority"])["properties"]
    row = next(s for s in lines if s.strip().startswith("1 "))
    assert first["module_id"] in row
    assert any("layout shifted" in s for s in lines)


def test_map_palette_keeps_marker_colours_exact():
    """Quantising the map keeps each severity colour and white exactly (a fixed palette)."""
    from PIL import Image

    from pvscan.report._figures import INK, SEVERITY_STYLE
    from pvscan.report._images import figure_palette, quantise_png

    pal = figure_palette("inferno", accents=[v["color"] for v in SEVERITY_STYLE.values()], inks=(INK,))
    colours = [(255, 255, 255)] + [tuple(int(v["color"][i:i + 2], 16) for i in (1, 3, 5))
                                   for v in SEVERITY_STYLE.values()]
    src = np.zeros((8, 8 * len(colours), 3), dtype=np.uint8)
    for k, c in enumerate(colours):
        src[:, 8 * k:8 * (k + 1)] = c
    buf = io.BytesIO()
    Image.fromarray(src).save(buf, format="PNG")
    out = np.asarray(Image.open(io.BytesIO(quantise_png(buf.getvalue(), pal))).convert("RGB"))
    assert np.array_equal(out, src)


def test_quantise_takes_the_nearest_palette_entry_first_on_ties(rng):
    """Each pixel gets the palette entry at the least integer squared distance, the lowest
    index among equals (a palette with repeated entries), as a brute-force search gives."""
    from PIL import Image

    from pvscan.report._images import quantise_rgb

    pal_rgb = rng.integers(0, 256, size=(256, 3))
    pal_rgb[128:] = pal_rgb[:128]  # every colour twice: ties everywhere
    pal = Image.new("P", (1, 1))
    pal.putpalette(pal_rgb.astype(np.uint8).reshape(-1).tolist())
    src = rng.integers(0, 256, size=(37, 53, 3)).astype(np.uint8)
    src[0, :10] = pal_rgb[:10]  # some pixels exactly on a palette colour
    out = np.asarray(Image.open(io.BytesIO(quantise_rgb(src, pal))))
    d = ((src.reshape(-1, 1, 3).astype(np.int64) - pal_rgb[None, :, :]) ** 2).sum(axis=2)
    assert np.array_equal(out.reshape(-1), np.argmin(d, axis=1))
    assert out.max() < 128


def test_healthy_plant_report_and_summary(tmp_path):
    """No anomaly: the report still has its map, plots, validity and cautions; the summary says so."""
    import click
    from click.testing import CliRunner

    from pvscan.cli._summary import print_inspection_summary
    from pvscan.report import write_report

    res = build_result(tmp_path)
    (res / "anomalies.geojson").write_text('{"type": "FeatureCollection", "features": []}')
    with open(res / "workorders.csv") as fh:
        header = fh.readline()
    (res / "workorders.csv").write_text(header)
    html_text = write_report(res).read_text()
    doc = parse(html_text)
    assert doc.cards == []
    assert "No anomalies" in html_text and "Nothing to do" in html_text
    assert len(doc.imgs) == 1 + 4
    for a in doc.imgs:
        decode_png(a["src"])

    @click.command()
    def show():
        print_inspection_summary(res)

    r = CliRunner().invoke(show, [])
    assert r.exit_code == 0, r.output
    assert "anomalies 0" in r.output and "power loss 0 W" in r.output


def test_markup_is_balanced(report_html):
    """Every element that HTML requires to be closed is closed, in order (WHATWG HTML: void
    elements have no end tag; p, li, dt, dd, tr, td, th may omit theirs but we close them)."""
    void = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
            "track", "wbr"}

    class Balance(HTMLParser):
        def __init__(self):
            super().__init__()
            self.stack, self.problems = [], []

        def handle_starttag(self, tag, attrs):
            if tag not in void:
                self.stack.append(tag)

        def handle_endtag(self, tag):
            if not self.stack or self.stack[-1] != tag:
                self.problems.append((tag, list(self.stack[-3:])))
            else:
                self.stack.pop()

    b = Balance()
    b.feed(report_html)
    b.close()
    assert b.problems == [] and b.stack == []
    assert report_html.lstrip().startswith("<!DOCTYPE html>")
    ids = re.findall(r'\sid="([^"]+)"', report_html)
    assert len(ids) == len(set(ids)), "element ids are unique"


def test_report_command_with_moved_ortho(tmp_path):
    """`pvscan report --ortho` draws from a tile given on the command line when the one named
    in summary.json is gone."""
    from click.testing import CliRunner

    from pvscan.cli.main import cli

    res = build_result(tmp_path, with_ortho=False)
    tif = tmp_path / "flight" / "thermal.tif"
    r = CliRunner().invoke(cli, ["report", str(res), "--ortho", str(tif)])
    assert r.exit_code == 0, r.output
    doc = parse((res / "report.html").read_text())
    crops = [a for a in doc.imgs if (a.get("class") or "") == "crop"]
    assert len(crops) == 2 * len(PLANTED)


def test_weather_series_plotted_against_the_limits(tmp_path):
    from pvscan.report import write_report

    res = build_result(tmp_path, series=True)
    doc = parse(write_report(res).read_text())
    imgs = [a for a in doc.imgs if a.get("alt") == "irradiance and wind during the flight"]
    assert len(imgs) == 1
    im = decode_png(imgs[0]["src"])
    assert im.size[0] > 600


def test_map_marks_link_to_cards_at_the_anomaly(result, report_html):
    """Each anomaly mark on the map is a link to its card, placed where the anomaly is: the
    open module (priority 1) lies right of the bypassed substring (2) on the same table, and
    the hot cell (3) on the southern table, lower on the map."""
    pins = re.findall(r'<a class="pin" href="#(a\d+)" title="[^"]*" style="left:([\d.]+)%;top:([\d.]+)%"',
                      report_html)
    assert [p[0] for p in pins] == ["a1", "a2", "a3"]
    pos = {p[0]: (float(p[1]), float(p[2])) for p in pins}
    assert all(0 < x < 100 and 0 < y < 100 for x, y in pos.values())
    assert pos["a1"][0] > pos["a2"][0] and abs(pos["a1"][1] - pos["a2"][1]) < 5
    assert pos["a3"][1] > pos["a1"][1] + 10


def test_open_module_close_up_stands_out_from_its_neighbours(report_html):
    """In the close-up of the open module (card 1) the neighbouring modules sit near the
    configured level (35 % of the colour window) and the warm module well above it."""
    from pvscan.io.settings import load_pipeline

    level = load_pipeline()["report"]["crop_median_level"]
    card = report_html.split('id="a1"')[1].split("</article>")[0]
    src = re.search(r'<img class="crop" src="([^"]+)"', card).group(1)
    im = decode_png(src)
    assert im.mode == "P"
    idx = np.asarray(im).astype(float)
    h, w = idx.shape
    rows = slice(int(0.3 * h), int(0.7 * h))
    centre = np.median(idx[rows, int(0.4 * w):int(0.6 * w)]) / 240.0
    side = np.median(idx[rows, 2:int(0.15 * w)]) / 240.0
    assert side == pytest.approx(level, abs=0.12)
    assert centre > level + 0.3


def test_two_overlapping_tiles(tmp_path):
    """An ortho in two overlapping tiles: the map is one mosaic and each crop comes whole from
    the tile that covers it best (no nodata inside the module)."""
    import rasterio
    from rasterio.windows import Window

    from pvscan.report import write_report
    from pvscan.report._build import _MapGeometry
    from pvscan.report._raster import ThermalView, open_thermal
    from pvscan.report._result import load_result

    res = build_result(tmp_path)
    src = tmp_path / "flight" / "thermal.tif"
    tiles = []
    with rasterio.open(src) as ds:
        half = ds.width // 2
        for k, (c0, c1) in enumerate(((0, half + 40), (half - 40, ds.width))):
            win = Window(c0, 0, c1 - c0, ds.height)
            prof = ds.profile | {"width": c1 - c0, "transform": ds.window_transform(win)}
            out = tmp_path / "flight" / f"tile{k}.tif"
            with rasterio.open(out, "w", **prof) as dst:
                dst.write(ds.read(1, window=win), 1)
            tiles.append(out)
    summary = json.loads((res / "summary.json").read_text())
    summary["inputs"]["files"] = [str(t) for t in tiles]
    (res / "summary.json").write_text(json.dumps(summary))
    doc = parse(write_report(res).read_text())
    crops = [a for a in doc.imgs if (a.get("class") or "") == "crop"]
    assert len(crops) == 2 * len(PLANTED)
    data = load_result(res)
    with open_thermal(tiles) as oset:
        view = ThermalView(oset)
        geo = _MapGeometry(data, view.crs)
        mosaic, extent = view.overview(400)
        assert np.isfinite(mosaic).mean() > 0.95
        for g in geo.modules:
            arr, _ = view.crop(g.buffer(-0.1).bounds)
            assert np.isfinite(arr).all()
        # a box straddling the seam wider than the overlap is filled from both tiles
        with rasterio.open(tiles[1]) as ds:
            x_seam = ds.bounds.left + 2.0  # the middle of the 4 m overlap
        arr, _ = view.crop((x_seam - 5.0, Y0 + 4.5, x_seam + 5.0, Y0 + 5.5))
        assert np.isfinite(arr).all()


def test_flight_period_is_readable():
    from pvscan.report._build import _period

    assert _period("2026-06-14T10:40:00+02:00", "2026-06-14T11:25:00+02:00") == "14 Jun 2026, 10:40–11:25 (UTC+02:00)"
    # the end given in UTC is shown in the flight's own offset (ISO 8601 offsets)
    assert _period("2026-06-14T10:40:00+02:00", "2026-06-14T09:25:00+00:00") == "14 Jun 2026, 10:40–11:25 (UTC+02:00)"
    assert _period("2026-06-14T10:40:00+02:00", "2026-06-14T10:40:48+02:00") == \
        "14 Jun 2026, 10:40:00–10:40:48 (UTC+02:00)"
    assert _period("not a time", "") == "not a time"


def test_result_read_again_is_the_same_and_independent(result, tmp_path):
    """Reading a result folder twice gives equal records that do not share state; a folder
    renamed into place is the same folder; a rewritten file is read anew (checks against the
    files themselves, parsed with the standard json module)."""
    import shutil

    from pvscan.report._result import load_result

    first = load_result(result)
    second = load_result(result)
    assert first.modules.equals(second.modules) and first.anomalies.equals(second.anomalies)
    assert first.summary == second.summary
    first.modules.loc[0, "t_median_c"] = -999.0
    first.summary["site"] = "changed"
    third = load_result(result)
    assert third.modules.loc[0, "t_median_c"] != -999.0 and third.summary.get("site") != "changed"
    moved = tmp_path / "moved"
    shutil.copytree(result, tmp_path / "copy")
    (tmp_path / "copy").rename(moved)
    assert load_result(moved).result_dir == moved
    # a file written anew (a new inode, as the atomic writers do) is parsed again
    gj = json.loads((moved / "modules.geojson").read_text())
    gj["features"][0]["properties"]["t_median_c"] = 12.5
    tmp = moved / "modules.tmp"
    tmp.write_text(json.dumps(gj))
    tmp.replace(moved / "modules.geojson")
    again = load_result(moved)
    mid = gj["features"][0]["properties"]["module_id"]
    assert float(again.modules.set_index("module_id").loc[str(mid), "t_median_c"]) == 12.5


def test_result_just_written_is_read_as_the_file_says(tmp_path):
    """The report in the process that wrote the result takes the written documents instead of
    parsing the files again; what it gets must be what the files say (checked against the
    files parsed with the standard json module, RFC 8259), and a file changed since must be
    read anew."""
    import geopandas as gpd
    import pandas as pd
    import shapely
    from conftest import test_seed
    from shapely.geometry import box as sbox

    from pvscan.io import geojson as gj
    from pvscan.io import outputs
    from pvscan.report import _result

    rng = np.random.default_rng(test_seed())
    n = 12
    x = X0 + np.arange(n) * (MOD_W + 0.05) + rng.uniform(0, 0.01, n)
    mods = gpd.GeoDataFrame({"module_id": [f"T01-R1-C{c + 1:02d}" for c in range(n)], "table_id": "T01",
                             "geometry": [sbox(v, Y0, v + MOD_W, Y0 + MOD_L) for v in x]}, crs=CRS)
    t = 40.0 + rng.normal(0.0, 0.7, n)  # values with many digits, rounded by the writer
    table = pd.DataFrame({"t_mean_c": t, "t_median_c": t, "t_p95_c": t + 1, "t_max_c": t + 3, "t_min_c": t - 2,
                          "t_std_k": rng.uniform(0.3, 0.9, n), "valid_fraction": rng.uniform(0.9, 1.0, n),
                          "reference_c": np.full(n, 40.0)})
    table["delta_t_k"] = table["t_median_c"] - table["reference_c"]
    table["delta_t_norm_k"] = table["delta_t_k"] * 1.3
    table.loc[int(rng.integers(n)), "t_std_k"] = np.nan
    path = outputs.write_modules_geojson(tmp_path / "modules.geojson", mods, table)
    handed = _result._features(path)  # the document written, as the report after inspect reads it
    assert gj.written_document(path) is None  # handed out once
    parsed = _result._features(path)  # the file parsed
    assert list(handed.columns) == list(parsed.columns)
    pd.testing.assert_frame_equal(handed.drop(columns="geometry"), parsed.drop(columns="geometry"))
    assert all(shapely.equals_exact(a, b, 0.0) for a, b in zip(handed["geometry"], parsed["geometry"]))
    on_disk = json.loads(path.read_text(encoding="utf-8"))
    assert [f["properties"]["t_median_c"] for f in on_disk["features"]] == handed["t_median_c"].tolist()
    # written, then changed on disk: the file is read
    path = outputs.write_modules_geojson(tmp_path / "modules.geojson", mods, table)
    doc = json.loads(path.read_text(encoding="utf-8"))
    doc["features"][0]["properties"]["t_median_c"] = 12.5
    tmp = tmp_path / "modules.tmp"
    tmp.write_text(json.dumps(doc), encoding="utf-8")
    tmp.replace(path)
    assert _result._features(path)["t_median_c"].iloc[0] == 12.5
