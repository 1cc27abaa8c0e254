"""Output files: RFC 7946 GeoJSON, work-order CSV, GeoPackage, summary, atomic writing.

External references: RFC 7946 (GeoJSON: WGS84 lon/lat, right-hand rings, no "crs"), pyproj
and geopandas (reprojection), pyogrio/GDAL (GeoPackage reading), the JSON Schemas of the
outputs (jsonschema, Draft 2020-12).
"""
from __future__ import annotations

import csv
import json
import os
import re

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
from pyproj import Transformer
from shapely.geometry import Polygon, shape

from pvscan.diagnose.loss import estimate_loss
from pvscan.diagnose.rank import rank
from pvscan.errors import OutputError
from pvscan.io import outputs
from pvscan.io.manifest import ModuleSpec
from pvscan.io.resources import load_schema, schema_errors
from pvscan.io.writers import atomic

CRS = "EPSG:32632"  # UTM 32N; the invented site lies near 47.6 N, 9.4 E
L, W, GAP = 2.0, 1.0, 0.02


def _modules(flip: bool = False) -> gpd.GeoDataFrame:
    """Two tables of 4 portrait modules each (long side north), module-local frames.

    ``flip`` mirrors the frame's v axis (origin at the east edge), so both handednesses of
    the frame are exercised.
    """
    rows = []
    x_base, y_base = 510000.0, 5272000.0
    for t, ty in enumerate((0.0, 6.0)):
        for c in range(4):
            x0 = x_base + c * (W + GAP)
            y0 = y_base + ty
            poly = Polygon([(x0, y0), (x0 + W, y0), (x0 + W, y0 + L), (x0, y0 + L)])
            if flip:
                fx0, fy0, fvx = x0 + W, y0, -W
            else:
                fx0, fy0, fvx = x0, y0, W
            rows.append(dict(module_id=f"T{t + 1}-R1-C{c + 1}", table_id=f"T{t + 1}", string_id="S1",
                             string_index=t * 4 + c + 1, table_row=1, table_col=c + 1, geometry=poly,
                             fx0=fx0, fy0=fy0, fux=0.0, fuy=L, fvx=fvx, fvy=0.0, lower_edge="u"))
    return gpd.GeoDataFrame(rows, geometry="geometry", crs=CRS)


def _spec() -> ModuleSpec:
    return ModuleSpec(pmax_w=400.0, width_m=W, length_m=L, cells_across=6, cells_along=12, bypass_diodes=3,
                      gamma_pmax_pct_per_k=-0.35)


def _anomalies() -> pd.DataFrame:
    nan = float("nan")
    rows = [
        dict(module_index=0, module_id="T1-R1-C1", module_indices=[0], module_ids=["T1-R1-C1"], defect="hot_cell",
             other_defects=[], region="cell", region_uv=[(0.5, 0.5 + 1 / 12, 0.0, 1 / 6)], delta_t_k=18.0,
             delta_t_norm_k=25.0, t_max_c=62.0, confidence=0.9, severity="repair", iec_class="CoA 2"),
        dict(module_index=1, module_id="T1-R1-C2", module_indices=[1], module_ids=["T1-R1-C2"],
             defect="bypassed_substring", other_defects=[], region="substring",
             region_uv=[(0.0, 1.0, 1 / 3, 2 / 3)], delta_t_k=6.0, delta_t_norm_k=8.0, t_max_c=50.0,
             confidence=0.8, severity="repair", iec_class="CoA 2"),
        dict(module_index=4, module_id="T2-R1-C1", module_indices=[4, 5, 6], module_ids=["T2-R1-C1", "T2-R1-C2",
             "T2-R1-C3"], defect="open_string", other_defects=[], region="modules", region_uv=[],
             delta_t_k=4.0, delta_t_norm_k=5.5, t_max_c=48.0, confidence=0.7, severity="repair", iec_class="CoA 2"),
        dict(module_index=3, module_id="T1-R1-C4", module_indices=[3], module_ids=["T1-R1-C4"], defect="junction_box",
             other_defects=["hot_cell"], region="spot", region_uv=[(0.0, 0.08, 0.4, 0.6)], delta_t_k=25.0,
             delta_t_norm_k=33.0, t_max_c=nan, confidence=0.6, severity="safety", iec_class="CoA 3"),
    ]
    return pd.DataFrame(rows)


def _table(n: int) -> pd.DataFrame:
    rng = np.random.default_rng(7)
    t = 40.0 + rng.normal(0, 0.5, n)
    tab = pd.DataFrame({"t_mean_c": t, "t_median_c": t, "t_p95_c": t + 1, "t_max_c": t + 3, "t_min_c": t - 2,
                        "t_std_k": np.full(n, 0.6), "valid_fraction": np.full(n, 0.97),
                        "reference_c": np.full(n, 40.0)})
    tab["delta_t_k"] = tab["t_median_c"] - tab["reference_c"]
    tab["delta_t_norm_k"] = tab["delta_t_k"] * 1.3
    tab.loc[7, "t_std_k"] = np.nan  # a NaN must be written as null
    return tab


@pytest.fixture
def result():
    mods = _modules()
    an = estimate_loss(_anomalies(), _spec(), {"poa_global": 850.0, "temp_air": 25.0, "wind_speed": 2.0},
                       {"specific_yield_kwh_per_kwp": 1100.0})
    an = rank(an)
    return mods, an


def _load(path):
    with open(path, encoding="utf-8") as fh:
        return json.load(fh)


def _decimals(x: float) -> int:
    s = repr(float(x))
    return len(s.split(".")[1]) if "." in s and "e" not in s else 0


def _all_positions(geom):
    t, c = geom["type"], geom["coordinates"]
    polys = [c] if t == "Polygon" else c
    for poly in polys:
        for ring in poly:
            yield from ring


# --------------------------------------------------------------------------- modules.geojson


@pytest.mark.parametrize("flip", [False, True])
def test_modules_geojson_rfc7946_and_schema(tmp_path, result, flip):
    mods, an = result
    mods = _modules(flip)
    path = outputs.write_modules_geojson(tmp_path / "modules.geojson", mods, _table(len(mods)), an,
                                         module_spec=_spec())
    doc = _load(path)
    # RFC 7946: FeatureCollection, lon/lat, counter-clockwise exteriors, closed rings, no crs
    assert outputs.validate_geojson_rfc7946(doc) == []
    assert "crs" not in doc
    assert schema_errors(doc, load_schema("modules.schema.json")) == []
    assert len(doc["features"]) == len(mods)
    for f in doc["features"]:
        for lon, lat in _all_positions(f["geometry"]):
            # rounded to 7 decimals, ~1 cm (RFC 7946 section 11.2 on precision)
            assert _decimals(lon) <= 7 and _decimals(lat) <= 7
    props = {f["properties"]["module_id"]: f["properties"] for f in doc["features"]}
    assert props["T1-R1-C3"]["defect"] is None and props["T1-R1-C3"]["power_loss_w"] == 0.0
    assert props["T2-R1-C4"]["t_std_k"] is None  # NaN -> null
    assert props["T1-R1-C1"]["defect"] == "hot_cell"
    assert props["T1-R1-C4"]["defect"] == "junction_box" and props["T1-R1-C4"]["severity"] == "safety"
    assert props["T1-R1-C1"]["anomaly_ids"] == [an.loc[an.defect == "hot_cell", "anomaly_id"].iloc[0]]


def test_modules_geojson_positions_match_pyproj(tmp_path, result):
    """Footprints reprojected to lon/lat and back land where they were (pyproj, within 1 cm)."""
    mods, an = result
    doc = _load(outputs.write_modules_geojson(tmp_path / "m.geojson", mods, _table(len(mods))))
    back = Transformer.from_crs(4326, CRS, always_xy=True)
    for f, geom in zip(doc["features"], mods.geometry):
        ring = np.array(f["geometry"]["coordinates"][0])
        x, y = back.transform(ring[:, 0], ring[:, 1])
        poly = Polygon(np.column_stack([x, y]))
        # 1e-7 deg is <= 1.1 cm on the ground (WGS84 geometry); symmetric difference
        assert poly.symmetric_difference(geom).area < 0.02 * geom.length
        assert abs(poly.area - geom.area) < 0.01 * geom.area
    # the same as geopandas' own reprojection (reference library)
    ref = mods.to_crs(4326)
    c0 = shape(doc["features"][0]["geometry"]).centroid
    assert c0.distance(ref.geometry.iloc[0].centroid) < 2e-7


def test_module_shares_do_not_double_count(tmp_path, result):
    """An open string's total is on the anomaly; each module carries its share (CONTRACT.md)."""
    mods, an = result
    mdoc = _load(outputs.write_modules_geojson(tmp_path / "m.geojson", mods, _table(len(mods)), an))
    adoc = _load(outputs.write_anomalies_geojson(tmp_path / "a.geojson", an, mods))
    a_open = next(f["properties"] for f in adoc["features"] if f["properties"]["defect"] == "open_string")
    assert a_open["power_loss_w"] == pytest.approx(3 * 400.0)  # every module of the run: pmax
    shares = [f["properties"]["power_loss_w"] for f in mdoc["features"]
              if f["properties"]["module_id"] in a_open["module_ids"]]
    assert shares == pytest.approx([400.0] * 3)
    total_modules = sum(f["properties"]["power_loss_w"] for f in mdoc["features"])
    total_anomalies = sum(f["properties"]["power_loss_w"] for f in adoc["features"])
    assert total_modules == pytest.approx(total_anomalies)


# --------------------------------------------------------------------------- anomalies.geojson


@pytest.mark.parametrize("flip", [False, True])
def test_anomalies_geojson_regions(tmp_path, result, flip):
    mods, an = result
    mods = _modules(flip)
    doc = _load(outputs.write_anomalies_geojson(tmp_path / "anomalies.geojson", an, mods))
    assert outputs.validate_geojson_rfc7946(doc) == []
    assert schema_errors(doc, load_schema("anomalies.schema.json")) == []
    assert [f["properties"]["priority"] for f in doc["features"]] == list(range(1, len(an) + 1))
    back = Transformer.from_crs(4326, CRS, always_xy=True)

    def area_m2(geom):
        polys = [geom["coordinates"]] if geom["type"] == "Polygon" else geom["coordinates"]
        tot = 0.0
        for poly in polys:
            ring = np.array(poly[0])
            x, y = back.transform(ring[:, 0], ring[:, 1])
            tot += Polygon(np.column_stack([x, y])).area
        return tot

    def tol(perimeter_m):
        # positions rounded to 1e-7 deg move each vertex by <= 0.56 cm (1e-7 deg of latitude
        # is 1.1 cm on the WGS84 ellipsoid), so the area may change by about perimeter x 0.56 cm
        return perimeter_m * 0.0056

    by = {f["properties"]["defect"]: f for f in doc["features"]}
    # a cell of a 12 x 6 grid, a third of the module, three whole modules (gaps closed)
    assert area_m2(by["hot_cell"]["geometry"]) == pytest.approx(L * W / 72, abs=tol(2 * (L / 12 + W / 6)))
    assert area_m2(by["bypassed_substring"]["geometry"]) == pytest.approx(L * W / 3, abs=tol(2 * (L + W / 3)))
    run = by["open_string"]
    assert run["geometry"]["type"] == "Polygon"  # the run is one region (2 cm gaps closed)
    assert area_m2(run["geometry"]) == pytest.approx(3 * L * W + 2 * GAP * L, abs=tol(2 * (L + 3 * W)))
    assert run["properties"]["module_ids"] == ["T2-R1-C1", "T2-R1-C2", "T2-R1-C3"]
    assert run["properties"]["module_id"] == "T2-R1-C1"
    # the hot cell sits in the first cell column of v, half-way along u
    c = shape(by["hot_cell"]["geometry"]).centroid
    x, y = back.transform(c.x, c.y)
    x0, y0 = 510000.0, 5272000.0
    exp_x = x0 + (W / 12 if not flip else W - W / 12)
    assert (x, y) == pytest.approx((exp_x, y0 + L * (0.5 + 1 / 24)), abs=0.02)
    assert by["junction_box"]["properties"]["t_max_c"] is None
    assert by["junction_box"]["properties"]["other_defects"] == ["hot_cell"]


def test_rfc7946_check_finds_violations():
    good = {"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {}, "geometry": {
        "type": "Polygon", "coordinates": [[[9.0, 47.0], [9.001, 47.0], [9.001, 47.001], [9.0, 47.0]]]}}]}
    assert outputs.validate_geojson_rfc7946(good) == []
    cw = json.loads(json.dumps(good))
    cw["features"][0]["geometry"]["coordinates"][0].reverse()
    assert any("counter-clockwise" in p for p in outputs.validate_geojson_rfc7946(cw))
    open_ring = json.loads(json.dumps(good))
    open_ring["features"][0]["geometry"]["coordinates"][0][-1] = [9.0, 47.0005]
    assert any("not closed" in p for p in outputs.validate_geojson_rfc7946(open_ring))
    with_crs = dict(good, crs={"type": "name", "properties": {"name": "EPSG:32632"}})
    assert any("crs" in p for p in outputs.validate_geojson_rfc7946(with_crs))
    projected = json.loads(json.dumps(good))
    projected["features"][0]["geometry"]["coordinates"][0] = [[510000.0, 5272000.0], [510001.0, 5272000.0],
                                                               [510001.0, 5272001.0], [510000.0, 5272000.0]]
    probs = outputs.validate_geojson_rfc7946(projected)
    assert any("longitude" in p for p in probs) and any("latitude" in p for p in probs)
    # the output schemas reject a crs member too
    bad = dict(good, crs={"type": "name"})
    assert schema_errors(bad, load_schema("anomalies.schema.json"))


# --------------------------------------------------------------------------- workorders.csv


def test_workorders_csv(tmp_path, result):
    mods, an = result
    path = outputs.write_workorders_csv(tmp_path / "workorders.csv", an, mods, CRS)
    text = path.read_text(encoding="utf-8")
    assert not any(line.startswith("#") for line in text.splitlines())  # plain CSV, no comment lines
    with open(path, newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    assert tuple(header) == outputs.WORKORDER_COLUMNS
    rows = outputs.read_workorders_csv(path)
    schema = load_schema("workorders.schema.json")
    for r in rows:
        assert schema_errors(r, schema) == []
    assert [r["priority"] for r in rows] == list(range(1, len(an) + 1))
    assert rows[0]["severity"] == "safety"
    with open(path, newline="", encoding="utf-8") as fh:
        raw = list(csv.DictReader(fh))
    to_ll = Transformer.from_crs(CRS, 4326, always_xy=True)
    for r, rr in zip(rows, raw):
        assert len(rr["lon"].split(".")[1]) <= 7 and len(rr["x"].split(".")[1]) <= 2
        lon, lat = to_ll.transform(r["x"], r["y"])  # pyproj: x, y and lon, lat are one point
        assert lon == pytest.approx(r["lon"], abs=1e-6) and lat == pytest.approx(r["lat"], abs=1e-6)
        assert r["crs"] == "EPSG:32632"
    run = next(r for r in rows if r["defect"] == "open_string")
    assert run["module_ids"] == "T2-R1-C1;T2-R1-C2;T2-R1-C3"
    assert run["x"] == pytest.approx(510000.0 + (3 * W + 2 * GAP) / 2, abs=0.01)  # centre of the run
    assert run["table_id"] == "T2" and run["string_id"] == "S1"


# --------------------------------------------------------------------------- GeoPackage


def test_geopackage_layers(tmp_path, result):
    mods, an = result
    res = outputs.module_results(len(mods), an)
    mods_out = mods.join(_table(len(mods))).join(res.drop(columns=["anomaly_ids"]))
    mods_out["anomaly_ids"] = res["anomaly_ids"]
    wo = outputs.workorders_table(an, mods, CRS)
    path = outputs.write_geopackage(tmp_path / "results.gpkg", mods_out, an, wo)
    layers = dict(pyogrio.list_layers(path))
    assert set(layers) == {"modules", "anomalies", "workorders", "layer_styles"}
    assert layers["layer_styles"] is None  # an attribute table: the default styles
    assert layers["workorders"] == "Point"
    g_mod = gpd.read_file(path, layer="modules", engine="pyogrio")
    g_an = gpd.read_file(path, layer="anomalies", engine="pyogrio")
    g_wo = gpd.read_file(path, layer="workorders", engine="pyogrio")
    assert g_mod.crs.to_epsg() == 32632 and g_an.crs.to_epsg() == 32632 and g_wo.crs.to_epsg() == 32632
    assert len(g_mod) == len(mods) and len(g_an) == len(an) == len(g_wo)
    assert g_mod.geometry.area.to_numpy() == pytest.approx(mods.geometry.area.to_numpy())
    assert list(g_wo["priority"]) == list(range(1, len(an) + 1))
    assert not list(tmp_path.glob(".*tmp*"))  # no temporary file left


# --------------------------------------------------------------------------- summary.json


def test_summary_valid_and_cautions(tmp_path, result):
    mods, an = result
    summ = outputs.build_summary(modules=mods, anomalies=an, module_spec=_spec(),
                                 inputs={"files": ["thermal.tif"], "crs": CRS, "gsd_m": 0.05},
                                 conditions={"poa_global": 850.0, "temp_air": 25.0, "wind_speed": 2.0},
                                 validity={"irradiance": {"value": 850.0, "limit": 600.0, "ok": True}},
                                 registration={"method": "phase_correlation"}, layout_shift_m=(0.3, -0.1),
                                 pipeline_path="pipelines/post_flight.toml")
    path = outputs.write_summary(tmp_path / "summary.json", summ)
    doc = _load(path)
    assert schema_errors(doc, load_schema("summary.schema.json")) == []
    assert doc["layout_shift_m"] == [0.3, -0.1]
    assert doc["counts"]["by_defect"] == {"bypassed_substring": 1, "hot_cell": 1, "junction_box": 1,
                                          "open_string": 1}
    assert doc["counts"]["by_severity"] == {"repair": 3, "safety": 1}
    assert doc["counts"]["modules_affected"] == 6
    assert doc["power_loss_w"] == pytest.approx(float(an["power_loss_w"].sum()), rel=1e-6)
    assert doc["loss"]["plant_share"] == pytest.approx(doc["power_loss_w"] / (8 * 400.0))
    assert "power_loss_w" not in doc["loss"]  # one total, no duplicate key
    assert doc["conditions"] == {"poa_global_w_m2": 850.0, "temp_air_c": 25.0, "wind_speed_m_s": 2.0}  # units
    text = " ".join(doc["safety"]).lower()
    for words in ("live (dc)", "disconnected", "arc", "fire", "hot", "qualified", "local electrical codes",
                  "aviation"):
        assert words in text
    bad = dict(summ)
    del bad["layout_shift_m"]
    with pytest.raises(OutputError, match="layout_shift_m"):
        outputs.write_summary(tmp_path / "bad.json", bad)
    assert not (tmp_path / "bad.json").exists()


# --------------------------------------------------------------------------- atomic writing


def test_staging_dir_failure_leaves_nothing(tmp_path, result):
    mods, an = result
    out = tmp_path / "run"
    with pytest.raises(RuntimeError):
        with outputs.staging_dir(out) as stage:
            outputs.write_modules_geojson(stage / "modules.geojson", mods, _table(len(mods)))
            assert (stage / "modules.geojson").exists()
            raise RuntimeError("a stage failed")
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []  # the staging sibling is gone too


def test_staging_dir_success_and_overwrite(tmp_path, result):
    mods, an = result
    out = tmp_path / "run"
    with outputs.staging_dir(out) as stage:
        assert stage.parent == tmp_path and stage != out
        outputs.write_anomalies_geojson(stage / "anomalies.geojson", an, mods)
        assert not out.exists()  # nothing visible until the block succeeds
    assert (out / "anomalies.geojson").exists()
    with pytest.raises(OutputError, match="exists"):
        with outputs.staging_dir(out):
            pass
    with outputs.staging_dir(out, overwrite=True) as stage:
        outputs.atomic_write(stage / "note.txt", "second run")
    assert sorted(p.name for p in out.iterdir()) == ["note.txt"]
    # a failed overwrite keeps the previous results untouched
    with pytest.raises(ValueError):
        with outputs.staging_dir(out, overwrite=True) as stage:
            outputs.atomic_write(stage / "note.txt", "third run")
            raise ValueError("boom")
    assert (out / "note.txt").read_text() == "second run"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]
    # an existing empty folder is accepted without overwrite
    empty = tmp_path / "empty"
    empty.mkdir()
    with outputs.staging_dir(empty) as stage:
        outputs.atomic_write(stage / "x.json", "{}")
    assert (empty / "x.json").exists()
    # a file in the way is an error naming it
    (tmp_path / "afile").write_text("x")
    with pytest.raises(OutputError, match="afile"):
        with outputs.staging_dir(tmp_path / "afile", overwrite=True):
            pass


def test_atomic_write_keeps_old_file_on_failure(tmp_path, monkeypatch):
    p = tmp_path / "summary.json"
    outputs.atomic_write(p, '{"a": 1}')
    assert p.read_text() == '{"a": 1}'

    def failing_replace(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(atomic.os, "replace", failing_replace)
    with pytest.raises(OutputError, match="summary.json"):
        outputs.atomic_write(p, '{"a": 2}')
    monkeypatch.undo()
    assert p.read_text() == '{"a": 1}'
    assert sorted(x.name for x in tmp_path.iterdir()) == ["summary.json"]  # temporary file removed


def test_validate_output_reports_every_file(tmp_path, result):
    mods, an = result
    with outputs.staging_dir(tmp_path / "out") as stage:
        outputs.write_modules_geojson(stage / "modules.geojson", mods, _table(len(mods)), an)
        outputs.write_anomalies_geojson(stage / "anomalies.geojson", an, mods)
        outputs.write_workorders_csv(stage / "workorders.csv", an, mods, CRS)
        outputs.write_summary(stage / "summary.json", outputs.build_summary(modules=mods, anomalies=an,
                                                                             module_spec=_spec()))
    report = outputs.validate_output(tmp_path / "out")
    assert report == {"modules.geojson": [], "anomalies.geojson": [], "summary.json": [], "workorders.csv": []}
    os.remove(tmp_path / "out" / "summary.json")
    assert outputs.validate_output(tmp_path / "out")["summary.json"] == ["missing"]


def test_empty_anomalies(tmp_path):
    mods = _modules()
    empty = rank(estimate_loss(_anomalies().iloc[:0], _spec(), None, {"specific_yield_kwh_per_kwp": 1000.0}))
    doc = _load(outputs.write_anomalies_geojson(tmp_path / "a.geojson", empty, mods))
    assert doc == {"type": "FeatureCollection", "features": []}
    p = outputs.write_workorders_csv(tmp_path / "w.csv", empty, mods)
    assert p.read_text().strip() == ",".join(outputs.WORKORDER_COLUMNS)
    mdoc = _load(outputs.write_modules_geojson(tmp_path / "m.geojson", mods, _table(len(mods)), empty))
    assert all(f["properties"]["defect"] is None for f in mdoc["features"])
    wo = outputs.workorders_table(empty, mods)
    outputs.write_geopackage(tmp_path / "r.gpkg", mods, empty, wo)
    assert set(dict(pyogrio.list_layers(tmp_path / "r.gpkg"))) == {"modules", "anomalies", "workorders",
                                                                   "layer_styles"}
    assert re.fullmatch(r"[A-Z0-9:]+", outputs.workorders_table(empty, mods).crs.to_string())


def test_workorders_in_another_site_crs(tmp_path, result):
    """x, y follow the requested site CRS; lon, lat stay the same point (pyproj as reference)."""
    mods, an = result
    rows_utm = outputs.workorders_table(an, mods, CRS)
    rows_merc = outputs.workorders_table(an, mods, "EPSG:3857")
    assert (rows_merc["crs"] == "EPSG:3857").all()
    to_ll = Transformer.from_crs("EPSG:3857", 4326, always_xy=True)
    lon, lat = to_ll.transform(rows_merc["x"].to_numpy(), rows_merc["y"].to_numpy())
    # 2-decimal metres in Web Mercator: <= 1 cm, about 1.5e-7 deg at 47.6 N
    assert lon == pytest.approx(rows_utm["lon"].to_numpy(), abs=3e-7)
    assert lat == pytest.approx(rows_utm["lat"].to_numpy(), abs=3e-7)
    assert rows_merc.crs.to_epsg() == 3857
