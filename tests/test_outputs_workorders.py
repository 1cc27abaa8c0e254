"""Work orders a crew can walk: electrical attributes, walking order, GPX, styled GeoPackage.

Unit checks on small invented plants (seeded from PVSCAN_TEST_SEED) and one simulated flight
inspected end to end.
"""
from __future__ import annotations

import csv
import itertools
import json
import sqlite3
import warnings
import xml.etree.ElementTree as ET

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
from conftest import test_seed
from shapely.geometry import Polygon

from pvscan.errors import RegistrationWarning, ValidityWarning
from pvscan.io import outputs
from pvscan.io.resources import load_schema, schema_errors
from pvscan.io.writers.walk import BANDS, path_length, two_opt

SEED = test_seed()
CRS = "EPSG:32632"  # UTM 32N; invented plant
W, L, GAP = 1.0, 2.0, 0.02

#: XML namespaces from the standards: OGC SLD 1.1 (OGC 05-078r4), Symbology Encoding 1.1
#: (OGC 05-077r4), Filter Encoding (OGC 04-095) and GPX 1.1 (topografix.com/GPX/1/1).
NS = {"sld": "http://www.opengis.net/sld", "se": "http://www.opengis.net/se",
      "ogc": "http://www.opengis.net/ogc", "gpx": "http://www.topografix.com/GPX/1/1"}


def _plant(rng, n_tables=12, cols=6, rows=2):
    """Tables scattered over a field, each rows x cols portrait modules, with stringing,
    combiner boxes and inverters as a layout would give them."""
    recs = []
    centres = rng.uniform(0, 300, size=(n_tables, 2))
    for t, (cx, cy) in enumerate(centres):
        for r in range(rows):
            for c in range(cols):
                x0, y0 = 510000 + cx + c * (W + GAP), 5272000 + cy + r * (L + GAP)
                recs.append(dict(module_id=f"T{t + 1:02d}-R{r + 1}-C{c + 1:02d}", table_id=f"T{t + 1:02d}",
                                 string_id=f"S{t + 1:02d}-{r + 1}", string_index=c + 1,
                                 combiner_id=f"CB{t // 4 + 1}", inverter_id=f"INV{t // 8 + 1}",
                                 table_row=r + 1, table_col=c + 1,
                                 geometry=Polygon([(x0, y0), (x0 + W, y0), (x0 + W, y0 + L), (x0, y0 + L)]),
                                 fx0=x0, fy0=y0, fux=0.0, fuy=L, fvx=W, fvy=0.0, lower_edge="u"))
    return gpd.GeoDataFrame(recs, geometry="geometry", crs=CRS)


def _anomalies(rng, modules, n):
    idx = rng.choice(len(modules), size=n, replace=False)
    sev = rng.choice(["safety", "repair", "monitor"], size=n, p=[0.2, 0.5, 0.3])
    return pd.DataFrame({
        "module_index": idx, "module_id": modules["module_id"].to_numpy()[idx],
        "module_indices": [[int(i)] for i in idx], "defect": "hot_cell", "severity": sev,
        "region_uv": [[(0.0, 1.0, 0.0, 1.0)]] * n, "delta_t_k": rng.uniform(5, 30, n),
        "delta_t_norm_k": rng.uniform(5, 30, n), "t_max_c": 60.0, "confidence": 0.9,
        "power_loss_w": rng.uniform(1, 100, n), "energy_loss_kwh_per_year": rng.uniform(1, 100, n),
        "priority": np.arange(1, n + 1), "action": "Inspect the module.",
    })


def _centres(modules, idx):
    c = modules.geometry.centroid.to_numpy()[idx]
    return np.column_stack([[p.x for p in c], [p.y for p in c]])


# --------------------------------------------------------------------------- walking order


@pytest.mark.parametrize("trial", range(3))
def test_walk_order_bands_tables_and_a_short_path(trial):
    rng = np.random.default_rng(SEED + trial)
    mods = _plant(rng)
    an = _anomalies(rng, mods, 30)
    wo = outputs.workorders_table(an, mods, CRS)
    walk = wo.sort_values("walk_order")
    assert sorted(wo["walk_order"]) == list(range(1, len(an) + 1))
    # every safety item first, then repairs, then monitor items (common practice)
    bands = [BANDS.index(s) for s in walk["severity"]]
    assert bands == sorted(bands)
    # table by table: within a band each table is visited once, its anomalies in a row
    for b in BANDS:
        tabs = walk.loc[walk["severity"] == b, "table_id"].tolist()
        runs = [k for k, _ in itertools.groupby(tabs)]
        assert len(runs) == len(set(tabs))
    # the walk is never longer than visiting in priority order (same bands, same start)
    xy = np.column_stack([walk["x"], walk["y"]])
    by_priority = wo.sort_values(["severity", "priority"], key=lambda s: s.map(BANDS.index)
                                 if s.name == "severity" else s)
    xy_p = np.column_stack([by_priority["x"], by_priority["y"]])
    assert path_length(xy) <= path_length(xy_p) + 1e-6


def test_two_opt_leaves_no_improving_reversal():
    """The 2-opt result is a local optimum: no reversal of a stretch shortens it (checked by
    brute force over every stretch, Croes 1958), and it is no longer than its start tour."""
    rng = np.random.default_rng(SEED)
    for _ in range(5):
        pts = rng.uniform(0, 100, size=(int(rng.integers(3, 12)), 2))
        start = rng.uniform(0, 100, size=2)
        first = list(rng.permutation(len(pts)))
        tour = two_opt(pts, first, start, max_passes=1000)
        assert sorted(tour) == list(range(len(pts)))
        best = path_length(pts[tour], start)
        assert best <= path_length(pts[first], start) + 1e-9
        for i, j in itertools.combinations(range(len(tour)), 2):
            alt = tour[:i] + tour[i:j + 1][::-1] + tour[j + 1:]
            assert path_length(pts[alt], start) >= best - 1e-6


# --------------------------------------------------------------------------- electrical attributes


def test_electrical_attributes_and_flight_identity_in_every_file(tmp_path):
    rng = np.random.default_rng(SEED)
    mods = _plant(rng, n_tables=4)
    an = _anomalies(rng, mods, 6)
    site, flight = {"name": "Plover Flats (invented)"}, {"id": "PF-2026-06", "start": "2026-06-14T10:40:00+02:00"}
    path = outputs.write_workorders_csv(tmp_path / "w.csv", an, mods, CRS, site=site, flight=flight)
    rows = outputs.read_workorders_csv(path)
    schema = load_schema("workorders.schema.json")
    by_id = mods.set_index("module_id")
    for r in rows:
        assert schema_errors(r, schema) == []
        m = by_id.loc[r["module_id"]]
        assert (r["string_id"], r["combiner_id"], r["inverter_id"]) == (m.string_id, m.combiner_id, m.inverter_id)
        assert (r["site"], r["flight_id"], r["flight_date"]) == ("Plover Flats (invented)", "PF-2026-06", "2026-06-14")
        assert r["status"] is None  # empty, for the crew
    doc = json.loads(outputs.write_anomalies_geojson(tmp_path / "a.geojson", an, mods).read_text())
    for f in doc["features"]:
        p = f["properties"]
        m = by_id.loc[p["module_id"]]
        assert (p["string_id"], p["combiner_id"], p["inverter_id"]) == (m.string_id, m.combiner_id, m.inverter_id)
        assert isinstance(p["walk_order"], int)
    assert sorted(f["properties"]["walk_order"] for f in doc["features"]) == list(range(1, len(an) + 1))
    mdoc = json.loads(outputs.write_modules_geojson(tmp_path / "m.geojson", mods, None, an).read_text())
    assert [f["properties"]["inverter_id"] for f in mdoc["features"]] == list(mods["inverter_id"])
    # a date-time at 23:30 local is still that local day, not the UTC one
    late = outputs.workorders_table(an, mods, CRS, flight={"id": "x", "start": "2026-06-14T23:30:00-05:00"})
    assert set(late["flight_date"]) == {"2026-06-14"}


# --------------------------------------------------------------------------- GPX


def test_gpx_opens_with_gdal(tmp_path):
    rng = np.random.default_rng(SEED)
    mods = _plant(rng, n_tables=5)
    an = _anomalies(rng, mods, 8)
    wo = outputs.workorders_table(an, mods, CRS, site="Plover Flats", flight={"id": "PF-1", "start": "2026-06-14"})
    path = outputs.write_workorders_gpx(tmp_path / "workorders.gpx", wo)
    root = ET.parse(path).getroot()
    assert root.tag == f"{{{NS['gpx']}}}gpx" and root.get("version") == "1.1"
    layers = dict(pyogrio.list_layers(path))
    assert "waypoints" in layers and "routes" in layers  # GDAL's GPX driver
    pts = gpd.read_file(path, layer="waypoints", engine="pyogrio")
    assert len(pts) == len(an)
    walk = wo.sort_values("walk_order")
    assert list(pts["name"]) == [f"{w} {m}" for w, m in zip(walk["walk_order"], walk["module_id"])]
    assert pts.geometry.x.to_numpy() == pytest.approx(walk["lon"].to_numpy(), abs=1e-7)
    assert pts.geometry.y.to_numpy() == pytest.approx(walk["lat"].to_numpy(), abs=1e-7)
    assert all(f"priority {p}" in d and s in d for p, s, d in zip(walk["priority"], walk["severity"], pts["desc"]))
    assert list(pts["type"]) == list(walk["severity"])
    assert not list(tmp_path.glob(".*"))  # written atomically: no temporary file left


# --------------------------------------------------------------------------- styled GeoPackage


def test_geopackage_has_an_sld_style_per_layer(tmp_path):
    rng = np.random.default_rng(SEED)
    mods = _plant(rng, n_tables=3)
    an = _anomalies(rng, mods, 5)
    wo = outputs.workorders_table(an, mods, CRS)
    path = outputs.write_geopackage(tmp_path / "r.gpkg", mods, an, wo)
    con = sqlite3.connect(path)
    try:
        cols = [r[1] for r in con.execute("PRAGMA table_info(layer_styles)")]
        styles = con.execute("SELECT f_table_name, f_geometry_column, styleSLD, useAsDefault "
                             "FROM layer_styles").fetchall()
        qmls = dict(con.execute("SELECT f_table_name, styleQML FROM layer_styles").fetchall())
        geom_cols = dict(con.execute("SELECT table_name, column_name FROM gpkg_geometry_columns"))
    finally:
        con.close()
    assert cols[1:] == ["f_table_catalog", "f_table_schema", "f_table_name", "f_geometry_column", "styleName",
                        "styleQML", "styleSLD", "useAsDefault", "description", "owner", "ui", "update_time"]
    assert {s[0] for s in styles} == {"modules", "anomalies", "workorders"} == set(geom_cols)
    for layer, gcol, sld, default in styles:
        assert gcol == geom_cols[layer] and default == 1
        root = ET.fromstring(sld.encode())
        assert root.tag == f"{{{NS['sld']}}}StyledLayerDescriptor" and root.get("version") == "1.1.0"
        assert root.find("sld:NamedLayer/se:Name", NS).text == layer
        rules = root.findall(".//se:FeatureTypeStyle/se:Rule", NS)
        filters = {r.find("se:Name", NS).text: r.find(".//ogc:Literal", NS) for r in rules}
        for sev in ("safety", "repair", "monitor"):
            assert filters[sev].text == sev
        labels = [p.text for p in root.findall(".//se:TextSymbolizer/se:Label/ogc:PropertyName", NS)]
        assert labels == ([] if layer == "modules" else ["priority"])
        fills = {r.find("se:Name", NS).text: r.find(".//se:Fill/se:SvgParameter[@name='fill']", NS).text
                 for r in rules if r.find("se:Name", NS).text in ("safety", "repair", "monitor")}
        # the QML copy (the column desktop GIS reads first) has the same categories and colours
        qml = ET.fromstring(qmls[layer].encode())
        assert qml.tag == "qgis" and qml.find("renderer-v2").get("attr") == "severity"
        cats = {c.get("value"): c.get("symbol") for c in qml.iter("category")}
        for sev, colour in fills.items():
            sym = next(x for x in qml.iter("symbol") if x.get("name") == cats[sev])
            rgba = sym.find(".//Option[@name='color']").get("value")
            assert rgba.split(",")[:3] == [str(int(colour[k:k + 2], 16)) for k in (1, 3, 5)]
        text = qml.find("labeling/settings/text-style")
        assert (None if text is None else text.get("fieldName")) == (None if layer == "modules" else "priority")
    # the layers still read as before
    assert len(gpd.read_file(path, layer="anomalies", engine="pyogrio")) == len(an)


# --------------------------------------------------------------------------- a simulated flight


@pytest.fixture(scope="module")
def inspected(tmp_path_factory):
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    root = tmp_path_factory.mktemp("crew")
    scenario = {"site": {"name": "Sandpiper Lane (invented)", "lon": 8.6, "lat": 46.9},
                "array": {"table_rows": 3, "tables_per_row": 2, "rows": 2, "cols": 10},
                "flight": {"start": "2026-06-14T10:40:00+02:00"},
                "defects": {"hot_cell": 2, "junction_box": 2, "bypassed_substring": 2, "open_module": 1,
                            "soiling": 1, "junction_box_rise_k": [28.0, 36.0]}}
    sim = simulate_flight(scenario, root / "flight", seed=SEED)
    # the plant's electrical layout: a combiner box per table row of tables, one inverter
    layout = root / "flight" / "layout.geojson"
    doc = json.loads(layout.read_text())
    for f in doc["features"]:
        p = f["properties"]
        if p.get("table_id"):
            p["combiner"] = "CB-" + p["table_id"].split("-")[0]  # a variant spelling of combiner_id
            p["inverter_id"] = "INV-1"
    layout.write_text(json.dumps(doc))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RegistrationWarning)  # small site: weak fit is not the subject
        warnings.simplefilter("ignore", ValidityWarning)
        inspect_flight(sim.manifest, out_dir=root / "out", report=False)
    return root / "out"


def test_simulated_flight_workorders_stand_alone(inspected):
    with open(inspected / "workorders.csv", newline="", encoding="utf-8") as fh:
        raw = list(csv.DictReader(fh))
    rows = outputs.read_workorders_csv(inspected / "workorders.csv")
    assert rows, "the simulated defects gave no work orders"
    for r in rows:
        assert r["site"] == "Sandpiper Lane (invented)" and r["flight_date"] == "2026-06-14"
        assert r["flight_id"] and r["string_id"] and r["status"] is None
        assert r["combiner_id"] == "CB-" + r["table_id"].split("-")[0] and r["inverter_id"] == "INV-1"
    assert {"walk_order", "string_id", "site", "flight_date", "status"} <= set(raw[0])
    assert {"safety", "repair"} <= {r["severity"] for r in rows}  # hot junction boxes: safety
    walk = sorted(rows, key=lambda r: r["walk_order"])
    bands = [BANDS.index(r["severity"]) for r in walk]
    assert bands == sorted(bands)  # every safety item first, monitor items after repairs
    prio = [BANDS.index(r["severity"]) for r in rows]  # the file itself is in priority order
    assert prio == sorted(prio) and [r["priority"] for r in rows] == list(range(1, len(rows) + 1))
    report = outputs.validate_output(inspected)
    assert report["workorders.csv"] == [] and report["workorders.gpx"] == []


def test_simulated_flight_gpx_opens_with_gdal(inspected):
    pts = gpd.read_file(inspected / "workorders.gpx", layer="waypoints", engine="pyogrio")
    rows = outputs.read_workorders_csv(inspected / "workorders.csv")
    assert len(pts) == len(rows)
    walk = sorted(rows, key=lambda r: r["walk_order"])
    assert pts.geometry.x.to_numpy() == pytest.approx([r["lon"] for r in walk], abs=1e-7)
    layers = dict(pyogrio.list_layers(inspected / "pvscan.gpkg"))
    assert "layer_styles" in layers
    assert all("string " in d and "combiner box CB-" in d and "inverter INV-1" in d for d in pts["desc"])
    anomalies = json.loads((inspected / "anomalies.geojson").read_text())["features"]
    assert all(f["properties"]["inverter_id"] == "INV-1" and f["properties"]["string_id"] for f in anomalies)
    modules = json.loads((inspected / "modules.geojson").read_text())["features"]
    assert {f["properties"]["inverter_id"] for f in modules} == {"INV-1"}
