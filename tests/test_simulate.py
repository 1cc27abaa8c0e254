"""Tests of the flight simulator (pvscan.simulate) against outside references.

References used:
- pvlib.temperature.faiman (reference library) for the healthy module temperature;
- Planck's law integrated numerically with scipy.integrate.quad and CODATA constants from
  scipy.constants, for the apparent temperatures the simulator writes;
- energy conservation (first law): heat added by a defect = electrical power it removes;
- RFC 7946 (GeoJSON lon/lat, counter-clockwise exterior rings); pyproj's UTM zone query and the zone rule
  (EPSG 326xx north / 327xx south, zone = floor((lon + 180) / 6) + 1) from EPSG's registry
  definitions (from memory).
"""
from __future__ import annotations

import hashlib
import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pvlib
import pytest
import rasterio
from click.testing import CliRunner
from scipy import constants, integrate, optimize

from pvscan.errors import OutputError, SimulationError
from pvscan.physics import radiometry
from pvscan.simulate import build_scene, load_scenario, simulate_flight
from pvscan.simulate.defects import heat_integral
from pvscan.simulate.geometry import utm_epsg
from pvscan.simulate.scene import GLASS, faiman
from pvscan.simulate.truth import module_truth

SCENARIOS = Path(__file__).parent / "scenarios"
DEMO = Path(__file__).parent.parent / "demo_site" / "scenario.toml"

#: A tiny plant (invented) used by most tests: 2 x 2 tables of 2 x 6 modules.
TINY = {
    "site": {"name": "Test plant Little Fen (invented)", "lon": 8.1, "lat": 47.3},
    "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 6, "modules_per_string": 6},
    "ortho": {"margin_m": 3.0, "nodata_border_m": 1.0},
}


def _quiet(**over):
    """TINY with no spreads, constant conditions, so model values are exact."""
    sc = json.loads(json.dumps(TINY))
    sc["conditions"] = {"module_spread_k": 0.0, "measurement_spread_k": 0.0, "cell_spread_k": 0.0}
    for k, v in over.items():
        sc.setdefault(k, {}).update(v)
    return sc


# ----------------------------------------------------------------------------- physics
def test_faiman_matches_pvlib():
    # Reference: pvlib.temperature.faiman; tolerance 0.01 K (the required agreement).
    rng = np.random.default_rng(1)
    g = rng.uniform(100, 1200, 50)
    ta = rng.uniform(-5, 40, 50)
    v = rng.uniform(0, 12, 50)
    ours = faiman(g, ta, v, 25.0, 6.84)
    ref = pvlib.temperature.faiman(g, ta, v, u0=25.0, u1=6.84)
    assert np.max(np.abs(ours - ref)) < 0.01


def test_healthy_module_truth_is_faiman():
    # Before camera effects, a healthy module without spreads is at the Faiman temperature
    # (pvlib reference, 0.01 K) for its own conditions.
    scene = build_scene(_quiet(conditions={"poa_irradiance_w_m2": 910.0, "ambient_c": 21.0, "wind_m_s": 3.4}), 2)
    t = module_truth(scene)
    ref = pvlib.temperature.faiman(910.0, 21.0, 3.4, u0=25.0, u1=6.84)
    assert np.max(np.abs(t["t_true_median_c"] - ref)) < 0.01
    assert np.all(np.abs(t["delta_t_k"]) < 0.01)


def _band_radiance_quad(temp_k, band=(7.5e-6, 13.5e-6)):
    h, c, k = constants.h, constants.c, constants.k   # CODATA via scipy.constants
    f = lambda lam: 2 * h * c ** 2 / lam ** 5 / math.expm1(h * c / (lam * k * temp_k))  # noqa: E731
    return integrate.quad(f, *band, epsabs=0, epsrel=1e-10)[0]


@pytest.mark.parametrize("export", [{"emissivity": 1.0, "reflected_c": 20.0},
                                    {"emissivity": 0.95, "reflected_c": 5.0}])
def test_apparent_temperature_against_planck_quadrature(export):
    # Independent reference: L_sensor = tau*(eps*L(T) + (1-eps)*L(T_sky)) + (1-tau)*L(T_air),
    # L = Planck's law integrated over 7.5-13.5 um by quadrature with CODATA constants; the
    # export reports T_app with eps_x*L(T_app) + (1-eps_x)*L(T_refl_x) = L_sensor.
    # 0.01 K tolerance.
    scene = build_scene(_quiet(defects={"open_module": 1}, export=export), 3)
    eps_x, t_rx = export["emissivity"], export["reflected_c"] + 273.15
    x, y = scene.pixel_centres(0, 0, scene.height, scene.width)
    s = scene.true_scene(x, y)
    app = np.asarray(scene.apparent(s))
    pick = np.flatnonzero(s["material"].ravel() == GLASS)[:: 4001][:4].tolist()
    pick += np.flatnonzero(s["material"].ravel() == 0)[:2].tolist()
    assert len(pick) >= 4
    for p in pick:
        eps, tau = s["emissivity"].ravel()[p], s["tau"].ravel()[p]
        L = tau * (eps * _band_radiance_quad(s["temp"].ravel()[p] + 273.15)
                   + (1 - eps) * _band_radiance_quad(s["temp_sky"].ravel()[p] + 273.15)) \
            + (1 - tau) * _band_radiance_quad(s["temp_atm"].ravel()[p] + 273.15)
        L_app = (L - (1 - eps_x) * _band_radiance_quad(t_rx)) / eps_x
        t_app = optimize.brentq(lambda t, L_app=L_app: _band_radiance_quad(t) - L_app, 150.0, 500.0, xtol=1e-6) - 273.15
        assert abs(app.ravel()[p] - t_app) < 0.01


def test_radiance_round_trip_on_simulator_pixels():
    # true -> apparent (simulator) -> true (pvscan.physics.radiometry) within 0.05 K on every pixel.
    scene = build_scene(_quiet(defects={"hot_cell": 1}, distractors={"reflections": 2}), 4)
    x, y = scene.pixel_centres(0, 0, scene.height, scene.width)
    s = scene.true_scene(x, y)
    app = scene.apparent(s)
    ex = scene.sc["export"]
    back = radiometry.true_from_apparent(
        app, emissivity=s["emissivity"], temp_sky_c=s["temp_sky"], export_emissivity=ex["emissivity"],
        export_reflected_c=ex["reflected_c"], transmission=s["tau"], temp_atm_c=s["temp_atm"],
        band_um=tuple(scene.sc["camera"]["band_um"]))
    assert np.max(np.abs(back - s["temp"])) < 0.05
    # and the apparent glass temperature is below the true one (sky colder than the glass)
    glass = s["material"] == GLASS
    assert np.all(app[glass] < s["temp"][glass])


@pytest.mark.parametrize("kind,share", [("open_module", 1.0), ("bypassed_substring", 1 / 3), ("pid", None)])
def test_energy_balance_of_heat_added(kind, share):
    # First law: heat added U * integral(T_defect - T_healthy) dA equals the electrical power
    # removed, P_mp * share, P_mp from pvlib's single-diode model (calcparams_desoto +
    # max_power_point) at the module's irradiance and temperature. The integral is the mean
    # rise over the rendered pixels of the module times its (tilted) surface area, so pixel
    # quantisation of the footprint
    # does not enter; 2 % tolerance.
    over = {"defects": {kind: 1, "pid_modules": [1, 1]}, "camera": {"gsd_m": 0.02}}
    scene = build_scene(_quiet(**over), 5)
    healthy = build_scene(_quiet(camera={"gsd_m": 0.02}), 5)
    d = scene.defects[0]
    i = d.module
    corners = scene.field.modules["corners"][i]
    (xmin, ymin), (xmax, ymax) = corners.min(axis=0) - 0.1, corners.max(axis=0) + 0.1
    c0 = int((xmin - scene.x0) / scene.gsd)
    r0 = int((scene.y1 - ymax) / scene.gsd)
    nc = int((xmax - xmin) / scene.gsd) + 2
    nr = int((ymax - ymin) / scene.gsd) + 2
    x, y = scene.pixel_centres(r0, c0, nr, nc)
    t1 = scene.true_scene(x, y)
    t0 = healthy.true_scene(x, y)
    on = t1["idx"] == i
    heat = scene.u_total[i] * np.mean(t1["temp"][on] - t0["temp"][on]) * scene.geom.area_m2
    g = scene.poa_local[i]
    pmax = scene.sc["module"]["pmax_w"]
    if share is None:
        share = d.params["loss_fraction"]
    expected = float(scene.p_mp[i]) * share
    assert heat == pytest.approx(expected, rel=0.02)
    # the diode model delivers less than the STC efficiency at this warm module (temperature
    # coefficient), by 3-20 %: the heat is not the pipeline's eta * G / U
    assert 0.80 < scene.p_mp[i] / (pmax * g / 1000.0) < 0.97
    # the truth's STC loss is the same power scaled to 1000 W/m2
    assert module_truth(scene)["power_loss_w"][i] == pytest.approx(pmax * share, rel=1e-9)


def test_hot_cell_loss_follows_its_heat():
    # Spot patterns: loss at STC = U * integral(rise dA) * 1000 / G, capped at pmax / diodes.
    scene = build_scene(_quiet(defects={"hot_cell": 1, "hot_cell_rise_k": [20.0, 20.0]}), 6)
    d = scene.defects[0]
    i = d.module
    loss = module_truth(scene)["power_loss_w"][i]
    heat = scene.u_total[i] * heat_integral(d, scene.geom, scene.dt_open[i])
    assert loss == pytest.approx(heat * 1000.0 / scene.poa_local[i], rel=1e-9)
    # a whole cell at +20 K is at least U * 20 K * cell area, and far below one substring
    g = scene.geom
    cell_area = g.area_m2 / (g.n_along * g.n_across)
    assert heat >= scene.u_total[i] * 20.0 * cell_area * 0.99
    assert loss < g.pmax_w / g.bypass_diodes


def test_open_module_truth_rise_is_undelivered_power_over_u():
    # Truth delta T of an open module (no spreads) = P_mp / (U(v) * area) (Faiman energy
    # balance), P_mp from pvlib's single-diode model at the module's G and temperature.
    import pvlib

    scene = build_scene(_quiet(defects={"open_module": 1}), 7)
    t = module_truth(scene)
    i = scene.defects[0].module
    g = scene.geom
    d = scene.diode
    il, i0, rs, rsh, nv = pvlib.pvsystem.calcparams_desoto(
        scene.poa[i], scene.temp_healthy[i], d.alpha_sc, d.a_ref, d.isc_a, d.i0_ref, 400.0, d.r_s, EgRef=d.eg_ref)
    p_mp = float(pvlib.pvsystem.max_power_point(il, i0, rs, rsh, nv)["p_mp"])
    expected = p_mp / ((25.0 + 6.84 * scene.wind[i]) * g.area_m2)
    assert t["delta_t_k"][i] == pytest.approx(expected, abs=0.01)
    # normalisation of the contract: delta * 1000/G * U(v)/U(1)
    norm = expected * 1000.0 / scene.poa[i] * (25 + 6.84 * scene.wind[i]) / (25 + 6.84)
    assert t["delta_t_norm_k"][i] == pytest.approx(norm, abs=0.02)


@pytest.mark.parametrize("lon,lat", [(8.1, 47.3), (-4.05, 39.23), (24.71, -30.42), (151.2, -33.8), (-106.3, 34.1)])
def test_utm_zone_matches_pyproj(lon, lat):
    # Reference: pyproj's UTM zone query (regular zones away from the Norway exceptions).
    from pyproj.aoi import AreaOfInterest
    from pyproj.database import query_utm_crs_info

    info = query_utm_crs_info(datum_name="WGS 84", area_of_interest=AreaOfInterest(lon, lat, lon, lat))
    codes = {int(i.code) for i in info if i.code.startswith("32")}
    assert utm_epsg(lon, lat) in codes


# ----------------------------------------------------------------------------- files
def _digest(folder: Path) -> dict:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


def test_same_seed_gives_identical_files(tmp_path):
    sc = dict(TINY, defects={"open_module": 1, "hot_cell": 1, "soiling": 1})
    a = simulate_flight(sc, tmp_path / "a", seed=11)
    b = simulate_flight(sc, tmp_path / "b", seed=11)
    c = simulate_flight(sc, tmp_path / "c", seed=12)
    da, db, dc = _digest(a.out_dir), _digest(b.out_dir), _digest(c.out_dir)
    assert da == db
    assert da["thermal.tif"] != dc["thermal.tif"]
    assert da["truth.geojson"] != dc["truth.geojson"]


def test_flight_folder_follows_the_contract(tmp_path):
    res = simulate_flight(dict(TINY, defects={"bypassed_substring": 1}), tmp_path / "f", seed=1)
    with open(res.manifest, "rb") as fh:
        man = tomllib.load(fh)
    for table, keys in {
        "site": ["name"],
        "flight": ["orthos", "layout", "start", "end"],
        "ortho": ["units", "scale", "offset", "nodata", "emissivity", "reflected_c"],
        "conditions": ["poa_irradiance_w_m2", "ambient_c", "wind_m_s"],
        "module": ["pmax_w", "gamma_pmax_pct_per_k", "width_m", "length_m", "cells_across", "cells_along",
                   "half_cut", "bypass_diodes", "emissivity"],
        "layout": ["tilt_deg", "azimuth_deg"],
    }.items():
        for k in keys:
            assert k in man[table], f"[{table}] {k}"
    from pvscan.io.manifest import load_flight

    fl = load_flight(res.manifest)
    assert fl.flight.start <= fl.flight.end
    with rasterio.open(res.orthos[0]) as ds:
        assert ds.count == 1 and ds.dtypes[0] == "float32"
        assert ds.crs.to_epsg() == utm_epsg(8.1, 47.3) == 32632
        assert ds.block_shapes[0] == (256, 256)
        assert ds.compression.name == "deflate"
        assert ds.nodata == -9999.0
        arr = ds.read(1, masked=True)
        assert 0 < arr.mask.mean() < 0.5          # a nodata border ...
        assert not arr.mask[arr.shape[0] // 2, arr.shape[1] // 2]   # ... around valid data
    lay = json.loads(res.layout.read_text())
    ring = lay["features"][0]["geometry"]["coordinates"][0]
    assert -180 <= ring[0][0] <= 180 and -90 <= ring[0][1] <= 90
    area = sum(p[0] * q[1] - q[0] * p[1] for p, q in zip(ring[:-1], ring[1:]))
    assert area > 0                                # RFC 7946: counter-clockwise exterior ring
    props = lay["features"][0]["properties"]
    assert {"module_id", "table_id", "string_id", "string_index"} <= set(props)
    truth = json.loads(res.truth.read_text())
    need = {"module_id", "table_id", "string_id", "string_index", "defect", "t_true_median_c",
            "reference_true_c", "delta_t_k", "delta_t_norm_k", "power_loss_w", "poa_global", "wind_speed"}
    assert need <= set(truth["features"][0]["properties"])
    from pvscan.io.resources import load_schema, schema_errors

    assert not schema_errors(truth, load_schema("truth.schema.json"))
    assert sum(f["properties"]["defect"] is not None for f in truth["features"]) == 1
    # truth geometry = the layout as drawn (results are reported in layout positions)
    lay_by_id = {f["properties"]["module_id"]: f["geometry"] for f in lay["features"]}
    assert all(f["geometry"] == lay_by_id[f["properties"]["module_id"]] for f in truth["features"])
    assert json.loads(res.truth_json.read_text())["seed"] == 1
    assert res.preview.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_southern_tiles_raw_gpkg_scenario(tmp_path):
    sc = load_scenario(SCENARIOS / "southern_halfcut_tiles.toml")
    res = simulate_flight(sc, tmp_path / "s", seed=2)
    man = tomllib.loads(res.manifest.read_text())
    assert man["layout"]["azimuth_deg"] == pytest.approx((0.0 - 6.0) % 360)   # facing north, rotated
    assert man["ortho"]["units"] == "kelvin" and man["ortho"]["scale"] == 0.01
    assert (man["layout"]["rows"], man["layout"]["cols"], man["layout"]["orientation"]) == (3, 8, "landscape")
    assert len(res.orthos) == 2 and res.layout.suffix == ".gpkg"
    with rasterio.open(res.orthos[0]) as a, rasterio.open(res.orthos[1]) as b:
        assert a.crs.to_epsg() == 32735                                          # UTM 35 south
        assert a.dtypes[0] == "uint16"
        assert a.bounds.right > b.bounds.left                                    # tiles overlap
        v = a.read(1, masked=True) * 0.01 - 273.15
        assert 0.0 < float(v.min()) and float(v.max()) < 90.0
    truth = json.loads(res.truth.read_text())
    from pvscan.io.resources import load_schema, schema_errors

    schema = load_schema("truth.schema.json")
    assert not schema_errors(truth, schema)
    truth["features"][0]["properties"]["defect"] = "scorch"          # the schema can fail
    assert schema_errors(truth, schema)
    truth["features"][0]["properties"]["defect"] = None
    jb = [f["properties"] for f in truth["features"] if f["properties"]["defect"] == "junction_box"]
    assert jb and all(p["centre"][0] == 0.5 for p in jb)       # split boxes on the middle line
    assert json.loads(res.truth_json.read_text())["layout_offset_m"] == [0.4, 0.25]


def test_tracker_series_scenario_writes_weather_and_frames(tmp_path):
    sc = load_scenario(SCENARIOS / "trackers_series.toml")
    res = simulate_flight(sc, tmp_path / "t", seed=3)
    man = tomllib.loads(res.manifest.read_text())
    assert man["conditions"]["series"] == "weather.csv" and man["flight"]["frames"] == "frames.geojson"
    assert man["layout"]["azimuth_deg"] == 270.0
    lines = res.weather.read_text().splitlines()
    assert lines[0] == "time,poa_irradiance_w_m2,ambient_c,wind_m_s" and len(lines) > 5
    frames = json.loads(res.frames.read_text())["features"]
    times = [f["properties"]["time"] for f in frames]
    assert times == sorted(times) and len(frames) > 4
    scene = build_scene(sc, 3)                     # lines run along the tracker rows
    edge = scene.plan.corners[0][1] - scene.plan.corners[0][0]
    assert abs(edge @ scene.field.a) == pytest.approx(np.hypot(*edge), rel=1e-9)
    truth = [f["properties"] for f in json.loads(res.truth.read_text())["features"]]
    assert len({round(p["poa_global"], 1) for p in truth}) > 1               # conditions vary
    pid = sorted((p["string_index"], p["power_loss_w"]) for p in truth if p["defect"] == "pid")
    assert pid[0][0] == 1 and all(a[1] > b[1] for a, b in zip(pid, pid[1:]))  # fades along the string
    from pvscan.io.manifest import load_flight

    load_flight(res.manifest)


def test_frames_match_pvscan_layout(tmp_path):
    # The simulator's module-local frame is the one pvscan.io.layout derives from the layout.
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight

    sc = dict(TINY, array=dict(TINY["array"], rotation_deg=7.0), layout={"offset_m": [0.5, -0.3]})
    res = simulate_flight(sc, tmp_path / "f", seed=4)
    fl = load_flight(res.manifest)
    with rasterio.open(res.orthos[0]) as ds:
        mods = read_layout(fl, ds.crs)
    scene = build_scene(sc, 4)
    ids = {k: i for i, k in enumerate(scene.field.modules["module_id"])}
    idx = np.array([ids[k] for k in mods["module_id"]])
    for u, v in [(0, 0), (1, 0), (0, 1), (0.3, 0.7)]:
        x, y = scene.field.uv_to_map(idx, np.full(idx.size, u), np.full(idx.size, v))
        xl = mods["fx0"] + u * mods["fux"] + v * mods["fvx"] - 0.5
        yl = mods["fy0"] + u * mods["fuy"] + v * mods["fvy"] + 0.3
        assert np.max(np.hypot(x - xl, y - yl)) < 1e-3


# ----------------------------------------------------------------------------- errors, CLI
def test_bad_scenarios_raise_one_line_errors(tmp_path):
    with pytest.raises(SimulationError, match="unknown key array.tiltdeg"):
        simulate_flight({"site": {"lon": 1.0, "lat": 45.0}, "array": {"tiltdeg": 3}}, tmp_path / "x")
    with pytest.raises(SimulationError, match="row_pitch_m"):
        simulate_flight({"site": {"lon": 1.0, "lat": 45.0}, "array": {"row_pitch_m": 2.0}}, tmp_path / "x")
    with pytest.raises(SimulationError, match="flight.start.*no UTC offset"):
        simulate_flight({"site": {"lon": 1.0, "lat": 45.0}, "flight": {"start": "2026-06-14T10:00"}}, tmp_path / "x")
    with pytest.raises(SimulationError, match="site"):
        simulate_flight({"array": {}}, tmp_path / "x")
    bad = tmp_path / "bad.toml"
    bad.write_text("[site\nlon = 1")
    with pytest.raises(SimulationError, match="not valid TOML"):
        load_scenario(bad)
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("keep")
    with pytest.raises(OutputError, match="not empty"):
        simulate_flight(TINY, tmp_path / "busy")
    with pytest.raises(OutputError, match="refusing"):
        simulate_flight(TINY, tmp_path / "busy", overwrite=True)
    assert (tmp_path / "busy" / "notes.txt").exists()


def test_cli_simulate_and_evaluate_perfect_result(tmp_path):
    from pvscan.cli.main import cli

    runner = CliRunner()
    scen = tmp_path / "s.toml"
    scen.write_text('[site]\nlon = 8.1\nlat = 47.3\n[defects]\nopen_module = 1\nhot_cell = 1\n')
    out = tmp_path / "flight"
    r = runner.invoke(cli, ["simulate", str(scen), "--out", str(out), "--seed", "9"])
    assert r.exit_code == 0, r.output
    assert "2 defective" in r.output
    r = runner.invoke(cli, ["simulate", str(scen), "--out", str(out)])
    assert r.exit_code == 1 and "Traceback" not in r.output
    # a result equal to the truth scores perfectly
    truth = json.loads((out / "truth.geojson").read_text())
    for f in truth["features"]:
        p = f["properties"]
        f["properties"] = {"module_id": p["module_id"], "defect": p["defect"], "t_median_c": p["t_true_median_c"],
                           "power_loss_w": p["power_loss_w"], "delta_t_norm_k": p["delta_t_norm_k"]}
    (tmp_path / "res").mkdir()
    (tmp_path / "res" / "modules.geojson").write_text(json.dumps(truth))
    r = runner.invoke(cli, ["evaluate", str(out), str(tmp_path / "res"), "--json", str(tmp_path / "s.json")])
    assert r.exit_code == 0, r.output
    s = json.loads((tmp_path / "s.json").read_text())
    assert s["module"]["precision"] == 1.0 and s["module"]["recall"] == 1.0
    assert s["power_loss"]["ratio"] == 1.0 and s["temperature"]["healthy_rmse_k"] == 0.0


def test_demo_scenario_is_valid_and_sized():
    sc = load_scenario(DEMO)
    a = sc["array"]
    n = a["table_rows"] * a["tables_per_row"] * a["rows"] * a["cols"]
    assert 3000 <= n <= 5000


def test_shapefile_layout_reads_back_with_strings(tmp_path):
    # Shapefile field names stop at 10 characters: string_index is written as string_idx.
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight

    sc = dict(TINY, layout={"format": "shp"}, export={"units": "kelvin"})
    res = simulate_flight(sc, tmp_path / "f", seed=8)
    assert res.layout.suffix == ".shp"
    fl = load_flight(res.manifest)
    with rasterio.open(res.orthos[0]) as ds:
        mods = read_layout(fl, ds.crs)
        v = ds.read(1, masked=True)
        assert 250.0 < float(v.min()) and float(v.max()) < 360.0       # kelvin
    truth = {f["properties"]["module_id"]: f["properties"] for f in json.loads(res.truth.read_text())["features"]}
    assert len(mods) == len(truth)
    for _, r in mods.iterrows():
        t = truth[r["module_id"]]
        assert (r["string_id"], int(r["string_index"])) == (t["string_id"], t["string_index"])


def test_distractors_change_only_what_they_should():
    # A mosaic seam adds its step to the apparent temperature inside its rectangle and
    # nothing elsewhere; a cloud shadow lowers the true module temperature by
    # depth * G / U at its centre (Faiman with the shaded irradiance).
    base = _quiet(camera={"psf_sigma_px": 0.0, "netd_k": 0.0}, ortho={"nodata_border_m": 0.0})
    plain = build_scene(base, 9)
    seamy = build_scene(dict(base, distractors={"seams": 1}), 9)
    r0, r1, c0, c1, step = seamy.seams[0]
    a = plain.render_block(0, 0, plain.height, plain.width)
    b = seamy.render_block(0, 0, plain.height, plain.width)
    inside = np.zeros(a.shape, bool)
    inside[r0:r1, c0:c1] = True
    assert np.allclose((b - a)[inside], step, atol=1e-6)
    assert np.allclose((b - a)[~inside], 0.0, atol=1e-6)
    cloudy = build_scene(dict(base, distractors={"cloud_shadows": 1, "cloud_shadow_depth": 0.3}), 9)
    c = cloudy.clouds[0]
    f = cloudy.cloud_factor(cloudy.field.modules["cx"], cloudy.field.modules["cy"])
    expected = pvlib.temperature.faiman(cloudy.poa * f, cloudy.temp_air, cloudy.wind)
    assert np.allclose(cloudy.temp_healthy, expected, atol=0.01)
    assert f.min() < 1.0 and f.min() >= 1.0 - c.amp - 1e-12


def test_every_defect_pattern_is_placed_as_described():
    from pvscan.simulate import DEFECT_KINDS

    sc = load_scenario(SCENARIOS / "all_defects_rotated.toml")
    scene = build_scene(sc, 1)
    t = module_truth(scene)
    kinds = {d.kind for d in scene.defects}
    assert kinds == set(DEFECT_KINDS)
    m = scene.field.modules
    for d in scene.defects:
        assert t["delta_t_k"][d.module] > 0.0, d.kind        # every defect is warmer than its reference
        for u0, u1, v0, v1 in d.boxes:
            assert 0.0 <= u0 < u1 <= 1.0 and 0.0 <= v0 < v1 <= 1.0
    run = [d.module for d in scene.defects if d.kind == "open_string"]
    assert len({m["string_id"][i] for i in run}) == 1
    assert sorted(m["string_index"][run]) == list(range(1, len(run) + 1))      # the whole string
    pid = sorted((m["string_index"][d.module], d.params["loss_fraction"]) for d in scene.defects if d.kind == "pid")
    assert [p[0] for p in pid] == [1, 2, 3]                                  # from the negative end
    g = scene.geom
    for d in scene.defects:
        if d.kind == "soiling":                                              # band at the lower edge
            assert d.boxes == [(0.0, d.params["height"], 0.0, 1.0)] and g.lower_edge == "u"
        if d.kind == "junction_box":                                         # centre of the upper short edge
            assert d.params["centre"][1] == 0.5 and d.params["centre"][0] > 0.9
    # spot patterns: region temperature is the p95, area patterns the median (contract)
    sub = next(d for d in scene.defects if d.kind == "bypassed_substring")
    assert t["delta_t_k"][sub.module] == pytest.approx(scene.dt_open[sub.module], abs=0.5)


def test_more_defects_than_room_warns():
    from pvscan.errors import PvscanWarning

    with pytest.warns(PvscanWarning, match="defects.open_module: no free module left"):
        scene = build_scene(dict(TINY, defects={"open_module": 40}), 1)
    assert 0 < len(scene.defects) < 40


def test_string_defects_find_a_string_on_a_small_plant(seed):
    # TINY has 4 tables of two strings of 6 modules; four spot defects, each keeping its
    # table's neighbouring columns free, can block every string before the PID and open
    # strings are placed: they are then placed first, from the same random state, and every
    # defect is there (no warning; warnings are errors in this suite). Counted against the
    # scenario: 4 modules + a whole string of 6 + a PID run of 2-3 modules from the string's
    # negative end.
    sc = dict(TINY, defects={"hot_cell": 1, "junction_box": 1, "open_module": 2, "open_string": 1, "pid": 1,
                             "pid_modules": [2, 3], "min_spacing_modules": 1})
    for k in range(4):
        scene = build_scene(sc, seed + k)
        kinds = [d.kind for d in scene.defects]
        assert kinds.count("hot_cell") == 1 and kinds.count("junction_box") == 1 and kinds.count("open_module") == 2
        assert kinds.count("open_string") == 6 and 2 <= kinds.count("pid") <= 3
        m = scene.field.modules
        pid = sorted(m["string_index"][d.module] for d in scene.defects if d.kind == "pid")
        assert pid == list(range(1, len(pid) + 1))
        assert len({d.module for d in scene.defects}) == len(scene.defects)


def test_module_spread_scales_with_the_rise_over_the_air():
    # Physics: a module cooled by U + dU runs -(T - T_air) * dU / U off its neighbours
    # (Faiman heat balance, D. Faiman 2008), so the thermal spread shrinks with G / U(v);
    # the measurement spread does not. Halving G and raising the wind from 1 to 5 m/s
    # scales the thermal part by (500 / 59.2) / (1000 / 31.84) = 0.269.
    def spread(g, v):
        sc = _quiet(conditions={"poa_irradiance_w_m2": g, "wind_m_s": v, "module_spread_k": 0.8,
                                "measurement_spread_k": 0.3, "varying": False},
                    array={"table_rows": 4, "tables_per_row": 4, "cols": 12})
        scene = build_scene(sc, 5)
        healthy = np.setdiff1d(np.arange(len(scene.temp_healthy)), scene._defect_modules)
        base = faiman(scene.poa_local, scene.temp_air, scene.wind, scene.u0, scene.u1)
        return float(np.std((scene.temp_healthy - base)[healthy]))

    s_ref, s_low = spread(1000.0, 1.0), spread(500.0, 5.0)
    expect_ref = np.hypot(0.8, 0.3)
    expect_low = np.hypot(0.8 * (500 / (25 + 6.84 * 5)) / (1000 / (25 + 6.84)), 0.3)
    assert abs(s_ref - expect_ref) < 0.15 * expect_ref
    assert abs(s_low - expect_low) < 0.15 * expect_low
    assert s_low < 0.6 * s_ref
