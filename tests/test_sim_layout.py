"""Layout errors of the simulator, the true module polygons, and a second flight by date.

Outside references: shapely (polygon centroids, affine transforms, areas), pyproj (the
ortho CRS of truth_ortho.geojson), the Python standard library's calendar dates.
"""
from __future__ import annotations

import json
import math
import tomllib

import numpy as np
import pytest
from click.testing import CliRunner
from conftest import test_seed
from shapely import affinity
from shapely.geometry import Polygon, shape

from pvscan.cli.main import cli
from pvscan.simulate import simulate_flight

SEED = test_seed() % 100_000
TINY = {"site": {"name": "Layout test plant", "lon": 8.1, "lat": 47.3},
        "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 6},
        "ortho": {"margin_m": 3.0, "preview_px": 200}, "camera": {"gsd_m": 0.1}}


def _sim(tmp_path, layout, seed=SEED):
    sc = json.loads(json.dumps(TINY))
    sc["layout"] = layout
    return simulate_flight(sc, tmp_path / "f", seed=seed)


def _by_id(path):
    fc = json.loads(path.read_text())
    return {f["properties"]["module_id"]: shape(f["geometry"]) for f in fc["features"]}, fc


def _drawn_in_ortho_crs(res):
    # the layout (lon/lat, RFC 7946) brought into the ortho CRS with pyproj
    from pyproj import Transformer

    epsg = json.loads(res.truth_json.read_text())["epsg"]
    tr = Transformer.from_crs("EPSG:4326", f"EPSG:{epsg}", always_xy=True)
    fc = json.loads(res.layout.read_text())
    out = {}
    for f in fc["features"]:
        ring = np.asarray(f["geometry"]["coordinates"][0])
        x, y = tr.transform(ring[:, 0], ring[:, 1])
        out[f["properties"]["module_id"]] = Polygon(np.stack([x, y], 1))
    return out


def test_layout_error_is_the_stated_similarity(tmp_path):
    # drawn = centre + scale * R(rot) (true - centre) + shift: checked with shapely's affinity
    # (rotate counter-clockwise about a point, scale about a point, translate); 1 mm.
    rng = np.random.default_rng(SEED)
    rot, scale = float(rng.uniform(0.2, 2.0)), float(1 + rng.uniform(-0.01, 0.01))
    dx, dy = (float(v) for v in rng.uniform(-1.5, 1.5, 2))
    res = _sim(tmp_path, {"offset_m": [dx, dy], "rotation_deg": rot, "scale": scale})
    truth = json.loads(res.truth_json.read_text())
    err = truth["layout_error"]
    assert (err["dx_m"], err["dy_m"], err["rotation_deg"], err["scale"]) == (dx, dy, rot, scale)
    assert err["local_rms_m"] == 0.0
    true, fc = _by_id(res.out_dir / "truth_ortho.geojson")
    assert fc["crs"]["properties"]["name"].endswith(str(truth["epsg"]))
    drawn = _drawn_in_ortho_crs(res)
    assert set(drawn) == set(true)
    c = tuple(err["centre_m"])
    for mid, poly in true.items():
        exp = affinity.translate(affinity.scale(affinity.rotate(poly, rot, origin=c), scale, scale, origin=c), dx, dy)
        assert np.allclose(np.asarray(exp.exterior.coords)[:4], np.asarray(drawn[mid].exterior.coords)[:4],
                           atol=1e-3) or exp.symmetric_difference(drawn[mid]).area < 1e-4
        assert drawn[mid].area == pytest.approx(poly.area * scale ** 2, rel=1e-4)


def test_no_layout_error_draws_the_modules_where_they_are(tmp_path):
    res = _sim(tmp_path, {})
    true, _ = _by_id(res.out_dir / "truth_ortho.geojson")
    drawn = _drawn_in_ortho_crs(res)
    worst = max(true[m].centroid.distance(drawn[m].centroid) for m in true)
    assert worst < 1e-3
    err = json.loads(res.truth_json.read_text())["layout_error"]
    assert (err["dx_m"], err["dy_m"], err["rotation_deg"], err["scale"], err["local_rms_m"]) == (0, 0, 0, 1, 0)


def test_local_distortion_moves_tables_rigidly(tmp_path):
    # each table moves as one (all its modules by the same vector); the RMS over tables is
    # reported; 1 mm.
    res = _sim(tmp_path, {"local_rms_m": 0.3})
    true, fc = _by_id(res.out_dir / "truth_ortho.geojson")
    drawn = _drawn_in_ortho_crs(res)
    table = {f["properties"]["module_id"]: f["properties"]["table_id"] for f in fc["features"]}
    moves: dict[str, list] = {}
    for m in true:
        d = np.subtract(drawn[m].centroid.coords[0], true[m].centroid.coords[0])
        moves.setdefault(table[m], []).append(d)
    vecs = []
    for v in moves.values():
        v = np.asarray(v)
        assert np.ptp(v, axis=0).max() < 1e-3
        vecs.append(v[0])
    rms = math.sqrt(np.mean(np.sum(np.square(vecs), axis=1)))
    assert json.loads(res.truth_json.read_text())["layout_error"]["local_rms_m"] == pytest.approx(rms, abs=1e-3)
    assert rms > 0


def test_second_flight_by_date_and_id(tmp_path):
    # Same site, another day: --date keeps the time of day and UTC offset; --flight-id is
    # written into flight.toml. A date that is not a calendar date is refused in one line.
    scen = tmp_path / "s.toml"
    scen.write_text('[site]\nname = "Layout test plant"\nlon = 8.1\nlat = 47.3\n'
                    '[array]\ntable_rows = 1\ntables_per_row = 1\nrows = 2\ncols = 4\n'
                    '[camera]\ngsd_m = 0.1\n[ortho]\nmargin_m = 3.0\npreview_px = 200\n'
                    '[flight]\nstart = "2026-06-14T10:40:00+02:00"\n')
    run = CliRunner().invoke(cli, ["simulate", str(scen), "--out", str(tmp_path / "b"), "--seed", "3",
                                   "--date", "2026-09-02", "--flight-id", "F-0902"])
    assert run.exit_code == 0, run.output
    man = tomllib.loads((tmp_path / "b" / "flight.toml").read_text())
    assert man["flight"]["id"] == "F-0902"
    assert str(man["flight"]["start"]).startswith("2026-09-02T10:40:00")
    assert str(man["flight"]["start"]).endswith("+02:00")
    bad = CliRunner().invoke(cli, ["simulate", str(scen), "--out", str(tmp_path / "c"), "--date", "2026-02-30"])
    assert bad.exit_code != 0
    assert "2026-02-30" in bad.output and "Traceback" not in bad.output
    assert not (tmp_path / "c").exists()
