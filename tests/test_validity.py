"""Checks that can fail a flight: ortho values, registration, coverage, plausibility.

Each case breaks one simulated flight the way real exports and layouts go wrong and checks
the one-line error (kelvin, degF, raw counts, nothing on the ortho) or the failed validity
check (coverage, registration with --accept-poor-registration) and the refusal of
`pvscan inspect` (click's CliRunner). The seed comes from PVSCAN_TEST_SEED.
"""
from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
import rasterio
from click.testing import CliRunner
from conftest import test_seed

from pvscan.cli.main import cli
from pvscan.measure.validity import coverage_check, plausibility_check
from pvscan.simulate import simulate_flight

SEED = test_seed()
#: 0 degC in kelvin (SI definition of the Celsius scale).
KELVIN = 273.15


def _scenario():
    return {"site": {"name": "Validity test site (invented)", "lon": -4.05, "lat": 39.23},
            "flight": {"start": "2026-06-14T10:40:00+02:00"},
            "array": {"kind": "fixed", "table_rows": 3, "tables_per_row": 2, "rows": 2, "cols": 12,
                      "row_pitch_m": 7.0, "rotation_deg": 2.0},
            "layout": {"offset_m": [0.0, 0.0]},
            "conditions": {"varying": False, "poa_irradiance_w_m2": 880.0, "ambient_c": 25.0, "wind_m_s": 2.0}}


@pytest.fixture(scope="module")
def flight(tmp_path_factory):
    d = tmp_path_factory.mktemp("validity") / "flight"
    simulate_flight(_scenario(), d, seed=SEED)
    return d


def _copy(flight, tmp_path, fn=None, dtype=None):
    """A copy of the flight whose ortho values are rewritten by ``fn(values, valid)``."""
    d = tmp_path / "flight"
    shutil.copytree(flight, d)
    if fn is not None:
        tif = d / "thermal.tif"
        with rasterio.open(tif) as src:
            prof = src.profile
            a = src.read(1).astype(np.float64)
            nd = src.nodata
        valid = a != nd if nd is not None else np.isfinite(a)
        out = fn(a, valid)
        if dtype is not None:
            prof.update(dtype=dtype, nodata=0)
            out = np.where(valid, out, 0).astype(dtype)
        with rasterio.open(tif, "w", **prof) as dst:
            dst.write(out.astype(prof["dtype"]), 1)
    return d


def _set_manifest(d, old, new):
    p = d / "flight.toml"
    txt = p.read_text()
    assert old in txt
    p.write_text(txt.replace(old, new))


def _inspect(d, tmp_path, *args):
    out = tmp_path / "out"
    res = CliRunner().invoke(cli, ["inspect", str(d / "flight.toml"), "--out", str(out), "--no-report", *args])
    return res, out


def test_correct_flight_is_valid(flight, tmp_path):
    res, out = _inspect(flight, tmp_path)
    assert res.exit_code == 0, res.output
    s = json.loads((out / "summary.json").read_text())
    checks = {c["name"]: c for c in s["validity"]["checks"]}
    for name in ("registration", "coverage", "plausibility"):
        assert checks[name]["passed"] is True, checks[name]
        assert checks[name]["message"]
    assert s["validity"]["ok"] is True
    assert s["layout_shift_m"] == [0.0, 0.0]
    assert s["registration"]["status"] == "ok"


@pytest.mark.parametrize("case,fn,dtype,words", [
    # 273.15 K = 0 degC (SI); the manifest says celsius
    ("kelvin", lambda a, v: np.where(v, a + KELVIN, a), None, ['look like kelvin', 'units = "kelvin"']),
    # degF = degC * 9/5 + 32 (definition of the Fahrenheit scale)
    ("degF", lambda a, v: np.where(v, a * 1.8 + 32.0, a), None, ["Fahrenheit"]),
    # centi-kelvin counts in uint16 (common practice for radiometric TIFF exports)
    ("counts", lambda a, v: np.round((a + KELVIN) * 100.0), "uint16", ["raw sensor counts", "0.01 K"]),
])
def test_units_mix_ups_are_named_errors(flight, tmp_path, case, fn, dtype, words):
    d = _copy(flight, tmp_path, fn, dtype)
    res, out = _inspect(d, tmp_path)
    assert res.exit_code == 1, res.output
    line = res.output.strip().splitlines()[-1]
    assert "thermal.tif" in line and "[ortho]" in line, line
    for w in words:
        assert w in line, line
    assert "Traceback" not in res.output and not out.exists()


def test_celsius_read_as_kelvin_is_named(flight, tmp_path):
    d = _copy(flight, tmp_path)
    _set_manifest(d, 'units = "celsius"', 'units = "kelvin"')
    res, out = _inspect(d, tmp_path)
    assert res.exit_code == 1 and 'units = "celsius"' in res.output, res.output


def test_no_usable_pixel_is_an_error(flight, tmp_path):
    d = _copy(flight, tmp_path, lambda a, v: np.full_like(a, -9999.0))
    res, out = _inspect(d, tmp_path)
    assert res.exit_code == 1 and "no usable pixel" in res.output, res.output


def test_partial_coverage_fails_the_coverage_check(flight, tmp_path):
    """Half the ortho nodata: the run goes on, the count is on the CLI and validity.ok false."""
    def half(a, v):
        b = a.copy()
        b[:, : a.shape[1] // 2] = -9999.0
        return b

    d = _copy(flight, tmp_path, half)
    res, out = _inspect(d, tmp_path)
    assert res.exit_code == 0, res.output
    s = json.loads((out / "summary.json").read_text())
    cov = {c["name"]: c for c in s["validity"]["checks"]}["coverage"]
    assert cov["passed"] is False and cov["modules_without_data"] > 0
    assert s["validity"]["ok"] is False and "coverage" in s["validity"]["failed"]
    assert f"{cov['modules_without_data']:,}" in res.output and "NOT VALID" in res.output


def test_featureless_ortho_is_refused_then_accepted(flight, tmp_path):
    """An ortho that shows no modules where the layout is: `inspect` refuses (exit 1, one line
    saying what was measured and what to do); --accept-poor-registration runs with
    validity.ok false and every finding at the confidence floor."""
    rng = np.random.default_rng(SEED)

    def smooth(a, v):
        med = float(np.median(a[v]))
        return np.where(v, med + rng.normal(0.0, 0.4, a.shape), a)

    d = _copy(flight, tmp_path, smooth)
    res, out = _inspect(d, tmp_path)
    assert res.exit_code == 1, res.output
    line = res.output.strip().splitlines()[-1]
    assert "probe ratios" in line and "pvscan align" in line and "--shift DX DY" in line, line
    assert not out.exists()
    res, out = _inspect(d, tmp_path, "--accept-poor-registration")
    assert res.exit_code == 0, res.output
    s = json.loads((out / "summary.json").read_text())
    reg = {c["name"]: c for c in s["validity"]["checks"]}["registration"]
    assert reg["passed"] is False and s["validity"]["ok"] is False
    from pvscan.io.settings import load_pipeline

    floor = load_pipeline()["conditions"]["confidence_floor"]
    assert s["validity"]["confidence_factor"] == pytest.approx(floor)
    an = json.loads((out / "anomalies.geojson").read_text())["features"]
    assert all(f["properties"]["confidence"] <= floor + 1e-9 for f in an)


def test_shift_option_forces_a_known_offset(flight, tmp_path):
    """--shift DX DY: a layout drawn 0.5 m east, 0.35 m south is used with the given offset;
    a wrong offset is judged by the same evidence and refused."""
    import geopandas as gpd

    d = _copy(flight, tmp_path)
    lay = d / "layout.geojson"
    g = gpd.read_file(lay)
    utm = g.estimate_utm_crs()
    g.to_crs(utm).translate(0.5, -0.35).to_crs(g.crs).to_frame("geometry").join(g.drop(columns="geometry")).pipe(
        gpd.GeoDataFrame).to_file(lay, driver="GeoJSON")
    res, out = _inspect(d, tmp_path, "--shift", "-0.5", "0.35")
    assert res.exit_code == 0, res.output
    s = json.loads((out / "summary.json").read_text())
    assert s["layout_shift_m"] == pytest.approx([-0.5, 0.35], abs=1e-4)
    assert s["validity"]["ok"] is True
    # 0.7 m off across the rows puts the footprints on the ground between them: refused
    res, out = _inspect(d, tmp_path, "--shift", "-0.5", "-0.35", "--overwrite")
    assert res.exit_code == 1 and "given shift" in res.output, res.output


def test_coverage_and_plausibility_checks():
    c = coverage_check(np.r_[np.ones(95), np.zeros(5)])
    assert c["value"] == pytest.approx(5.0) and c["passed"] is False and c["modules_without_data"] == 5
    assert coverage_check(np.ones(100))["passed"] is True
    # Faiman: T = T_air + G / (u0 + u1 v) = 25 + 900 / (25 + 6.84 * 2) = 48.26 degC (Faiman 2008)
    pred = np.full(50, 25 + 900 / (25 + 6.84 * 2))
    assert plausibility_check(pred + 1.0, pred)["passed"] is True
    assert plausibility_check(pred + KELVIN, pred)["passed"] is False


def test_registration_check_reads_the_placement_used():
    """The check's value is the worse probe ratio of the placement used; an indecisive
    choice between placements one module pitch apart fails it like a failed fit (a finding
    could sit on the neighbouring module: common practice, a result must say when it could not
    tell)."""
    from types import SimpleNamespace

    from pvscan.io.settings import load_pipeline
    from pvscan.measure.validity import registration_check

    st = load_pipeline()
    lim = float(st["register"]["evidence_max_ratio"])
    ev = {"drawn": {"ratio_u": 0.9, "ratio_v": 1.1}, "chosen": {"ratio_u": 0.2, "ratio_v": 0.35}}
    ok = registration_check(SimpleNamespace(status="ok", applied=True, evidence=ev, message="m"), st)
    assert ok["value"] == pytest.approx(0.35) and ok["limit"] == pytest.approx(lim) and ok["passed"] is True
    amb = registration_check(SimpleNamespace(status="ambiguous", applied=True, evidence=ev, message="m"), st)
    assert amb["passed"] is False and amb["value"] == pytest.approx(0.35)
    drawn = registration_check(SimpleNamespace(status="ok", applied=False, evidence=ev, message="m"), st)
    assert drawn["value"] == pytest.approx(1.1) and drawn["passed"] is False
    failed = registration_check(SimpleNamespace(status="failed", applied=False, message="m", evidence={
        "drawn": {"ratio_u": 0.9, "ratio_v": 1.1}, "proposals": [{"ratio_u": 0.7, "ratio_v": 0.65}]}), st)
    assert failed["passed"] is False and failed["value"] == pytest.approx(0.7)


# ---------------------------------------------------------------- inter-row shading
def _rows_layout(tilt_deg: float, width_m: float, pitch_m: float, n_rows: int = 3):
    """South-facing rows on flat ground (EPSG:32632): tables 2 per row, modules 1 m along the
    row, each table `width_m` of slant width seen in plan (width x cos tilt deep)."""
    import geopandas as gpd
    from shapely.geometry import box

    depth = width_m * np.cos(np.radians(tilt_deg))
    geoms, tables = [], []
    for r in range(n_rows):
        y0 = 5_300_000.0 - r * pitch_m  # the row in front (south) first
        for t in range(2):
            for m in range(10):
                x0 = 700_000.0 + t * 11.0 + m * 1.0
                geoms.append(box(x0, y0 - depth, x0 + 0.98, y0))
                tables.append(f"R{r}T{t}")
    return gpd.GeoDataFrame({"table_id": tables}, geometry=geoms, crs="EPSG:32632")


def _closed_form_shade(tilt_deg, width_m, pitch_m, sun_elev_deg, sun_az_deg, facing_deg=180.0):
    """Shaded share of a tilted row's slant width by the row in front, in the plane across
    the rows: f = 1 - p / (W (cos b + sin b / tan a_p)), tan a_p = tan(elevation) /
    cos(sun azimuth - facing) (row-spacing geometry of flat-ground arrays; common practice)."""
    b = np.radians(tilt_deg)
    cos_rel = np.cos(np.radians(sun_az_deg - facing_deg))
    if sun_elev_deg <= 0 or cos_rel <= 0:
        return None
    tan_ap = np.tan(np.radians(sun_elev_deg)) / cos_rel
    return float(max(0.0, 1.0 - pitch_m / (width_m * (np.cos(b) + np.sin(b) / tan_ap))))


def test_row_geometry_reads_depth_and_pitch_from_the_layout():
    from pvscan.measure.validity import row_geometry

    depth, pitch = row_geometry(_rows_layout(25.0, 2.0, 4.5), 180.0)
    assert depth == pytest.approx(2.0 * np.cos(np.radians(25.0)), abs=1e-9)
    assert pitch == pytest.approx(4.5, abs=1e-9)
    _, single = row_geometry(_rows_layout(25.0, 2.0, 4.5, n_rows=1), 180.0)
    assert single is None


@pytest.mark.parametrize("when, shaded", [
    ("2026-12-21T08:45:00+01:00", True),   # a low winter sun: the rows shade each other
    ("2026-06-21T13:00:00+02:00", False),  # a high summer sun at noon: no row shade
])
def test_row_shading_check_against_the_closed_form(when, shaded):
    """The check's shaded share equals the closed-form row-spacing geometry at pvlib's sun
    position (NREL SPA), and fails the flight exactly when some of a row is shaded."""
    import pandas as pd
    import pvlib

    from pvscan.measure.validity import row_shading_check

    lon, lat, tilt, width, pitch = 11.0, 47.8, 25.0, 2.0, 4.0
    c = row_shading_check(_rows_layout(tilt, width, pitch), tilt, 180.0, lon, lat, [when])
    sp = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([pd.Timestamp(when)]), lat, lon)
    expected = _closed_form_shade(tilt, width, pitch, float(sp["apparent_elevation"].iloc[0]),
                                  float(sp["azimuth"].iloc[0]))
    assert expected is not None
    assert c["value"] == pytest.approx(expected, abs=2e-4)
    assert (c["value"] > 0) is shaded
    assert c["passed"] is (not shaded)
    assert c["pitch_m"] == pytest.approx(pitch, abs=1e-3) and c["collector_width_m"] == pytest.approx(width, abs=1e-3)


def test_row_shading_check_unknown_for_one_row_and_zero_for_flat_rows():
    from pvscan.measure.validity import row_shading_check

    one = row_shading_check(_rows_layout(25.0, 2.0, 4.0, n_rows=1), 25.0, 180.0, 11.0, 47.8,
                            ["2026-12-21T08:45:00+01:00"])
    assert one["passed"] is None and one["value"] is None
    flat = row_shading_check(_rows_layout(0.0, 2.0, 4.0), 0.0, 180.0, 11.0, 47.8, ["2026-12-21T08:45:00+01:00"])
    assert flat["value"] == 0.0 and flat["passed"] is True
