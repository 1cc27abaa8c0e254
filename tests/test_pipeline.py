"""End to end: simulated flights through `pvscan inspect`, outputs against their schemas,
true temperatures against the simulator's truth, and the CLI's behaviour on bad input."""
from __future__ import annotations

import json
import shutil

import geopandas as gpd
import numpy as np
import pytest
from click.testing import CliRunner

from pvscan.cli.main import cli
from pvscan.io.outputs import validate_geojson_rfc7946
from pvscan.io.resources import load_schema, schema_errors
from pvscan.pipeline import inspect_flight
from pvscan.simulate import simulate_flight


def _scenario(**over):
    sc = {
        "site": {"name": "Test field Alder Reach (invented)", "lon": 11.37, "lat": 47.26},
        "array": {"table_rows": 3, "tables_per_row": 2, "rows": 2, "cols": 10, "rotation_deg": 12.0,
                  "modules_per_string": 10},
        "layout": {"features": "tables"},
        "defects": {"open_module": 1, "bypassed_substring": 1, "hot_cell": 1},
    }
    for k, v in over.items():
        sc.setdefault(k, {}).update(v)
    return sc


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    d = tmp_path_factory.mktemp("flight")
    res = simulate_flight(_scenario(), d / "flight", seed=7)
    out = d / "result"
    result = inspect_flight(res.manifest, out_dir=out, report=False)
    return res, out, result


def test_outputs_validate_against_schemas_and_rfc7946(simulated):
    _, out, _ = simulated
    for name, schema in (("modules.geojson", "modules.schema.json"),
                         ("anomalies.geojson", "anomalies.schema.json"),
                         ("summary.json", "summary.schema.json")):
        doc = json.loads((out / name).read_text())
        assert not schema_errors(doc, load_schema(schema)), name
        if name.endswith(".geojson"):
            assert validate_geojson_rfc7946(doc) == [], name
    summary = json.loads((out / "summary.json").read_text())
    assert len(summary["layout_shift_m"]) == 2
    assert summary["safety"], "summary carries the safety cautions"


def test_table_layout_split_into_the_simulated_footprints(simulated):
    res, out, _ = simulated
    truth = gpd.read_file(res.truth)
    mods = gpd.read_file(out / "modules.geojson")
    assert len(mods) == len(truth) == 3 * 2 * 2 * 10
    # the split footprints sit where the simulator drew its modules (same centres within 2 cm),
    # matched by position since ids of split tables are pvscan's own
    utm = mods.estimate_utm_crs()
    a = mods.to_crs(utm).geometry.centroid
    b = truth.to_crs(utm).geometry.centroid
    tree = b.sindex
    _, nearest = tree.nearest(a, return_all=False)
    d = a.distance(b.iloc[nearest].reset_index(drop=True), align=False)
    assert float(d.max()) < 0.02
    ratio = mods.to_crs(utm).area.to_numpy() / truth.to_crs(utm).area.iloc[nearest].to_numpy()
    np.testing.assert_allclose(ratio, 1.0, atol=0.01)


def test_healthy_true_temperature_within_1k_rms(simulated):
    # Truth is the simulator's noise-free true glass temperature (emissivity 0.85 glass,
    # export at emissivity 1.0, clear sky); the acceptance bound is 1.0 K RMS.
    res, out, _ = simulated
    truth = gpd.read_file(res.truth)
    mods = gpd.read_file(out / "modules.geojson")
    utm = mods.estimate_utm_crs()
    a = mods.to_crs(utm).geometry.centroid
    b = truth.to_crs(utm).geometry.centroid
    _, nearest = b.sindex.nearest(a, return_all=False)
    t_true = truth["t_true_median_c"].to_numpy()[nearest]
    healthy = truth["defect"].isna().to_numpy()[nearest]
    err = mods["t_median_c"].to_numpy()[healthy] - t_true[healthy]
    rms = float(np.sqrt(np.mean(err ** 2)))
    assert rms < 1.0
    # and without the radiometric correction the error would be several kelvin: the check bites
    apparent = simulated[2].summary["radiometry"]
    assert apparent["emissivity"] == pytest.approx(0.85)


def test_defects_found(simulated):
    _, out, _ = simulated
    an = json.loads((out / "anomalies.geojson").read_text())["features"]
    found = {f["properties"]["defect"] for f in an}
    assert {"open_module", "bypassed_substring", "hot_cell"} <= found


# --- CLI ------------------------------------------------------------------------------------
def test_cli_bad_key_one_line_error_nothing_written(simulated, tmp_path):
    res, _, _ = simulated
    flight = tmp_path / "flight"
    shutil.copytree(res.out_dir, flight)
    toml = (flight / "flight.toml").read_text().replace("wind_m_s", "wind_speed_m_s", 1)
    (flight / "flight.toml").write_text(toml)
    out = tmp_path / "out"
    r = CliRunner().invoke(cli, ["inspect", str(flight / "flight.toml"), "--out", str(out)])
    assert r.exit_code == 1
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "conditions.wind_speed_m_s" in lines[0]
    assert "Traceback" not in r.output
    assert not out.exists()


def test_cli_corrupt_ortho_leaves_nothing(simulated, tmp_path):
    res, _, _ = simulated
    flight = tmp_path / "flight"
    shutil.copytree(res.out_dir, flight)
    for tif in flight.glob("*.tif"):
        tif.write_bytes(b"II*\x00 this is not a GeoTIFF")
    out = tmp_path / "out"
    r = CliRunner().invoke(cli, ["inspect", str(flight / "flight.toml"), "--out", str(out)])
    assert r.exit_code == 1, r.output
    assert "thermal" in r.output and "Traceback" not in r.output
    assert not out.exists()
    assert not list(tmp_path.glob(".out.staging-*"))


def test_cli_refuses_to_replace_results_without_overwrite(simulated, tmp_path):
    res, _, _ = simulated
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("earlier result")
    r = CliRunner().invoke(cli, ["inspect", str(res.manifest), "--out", str(out), "--no-report"])
    assert r.exit_code == 1 and "--overwrite" in r.output
    assert (out / "keep.txt").read_text() == "earlier result"
