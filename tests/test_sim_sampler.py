"""Random flights: documented ranges, families that differ in kind, replay from scenario.toml.

Outside references: IEC TS 62446-3 (irradiance of at least 600 W/m2 for outdoor
thermography), pvlib (solar position; single-axis tracking angle), the scenario schema.
"""
from __future__ import annotations

import hashlib
import json
import os
import tomllib

import numpy as np
import pytest
from click.testing import CliRunner

from pvscan.cli.main import cli
from pvscan.io.resources import load_schema, schema_errors
from pvscan.simulate import simulate_random
from pvscan.simulate.sampler import FAMILIES, _sun, draw_scenario

SEED = int(os.environ.get("PVSCAN_TEST_SEED", "20260614")) % 10_000


def _draws(family, n=12):
    return [draw_scenario(SEED + k, family) for k in range(n)]


@pytest.mark.parametrize("family", FAMILIES)
def test_draws_are_valid_scenarios_within_acquisition_limits(family):
    schema = load_schema("scenario.schema.json")
    for sc in _draws(family, 6):
        assert not schema_errors(sc, schema)
        # IEC TS 62446-3: at least 600 W/m2 in the plane of the array
        assert 600.0 <= sc["conditions"]["poa_irradiance_w_m2"] <= 1000.0
        assert 0.5 <= sc["conditions"]["wind_m_s"] <= 6.0
        assert any(v for k, v in sc["defects"].items() if k != "min_spacing_modules")


@pytest.mark.parametrize("family", FAMILIES)
def test_draws_resolve_cells_as_the_pipeline_requires(family):
    # A detailed inspection needs at least [conditions] min_px_per_cell pixels along a cell's
    # edge (IEC TS 62446-3, from memory; the pipeline's own limit, read from its settings):
    # every draw, full or half-cut cells, meets it. The cell edge is computed here from the
    # datasheet (width / 6 across; length / 12 or / 24 along, half-cut cells doubled), the
    # flight height from the pinhole camera: H = GSD * f / pitch with a 12 um pitch and one of
    # the sampler's lenses (common practice), 25-100 m above the modules.
    from pvscan.io.settings import load_pipeline, section

    limit = float(section(load_pipeline(), "conditions")["min_px_per_cell"])
    assert limit >= 3.0
    cuts = set()
    for sc in _draws(family, 12):
        mod = sc["module"]
        along = mod["cells_along"] * (2 if mod["half_cut"] else 1)
        edge = min(mod["width_m"] / mod["cells_across"], mod["length_m"] / along)
        gsd = sc["camera"]["gsd_m"]
        assert limit < edge / gsd <= 6.05  # 6 px drawn, GSD rounded down to 0.1 mm
        h = sc["flight"]["altitude_m"]
        assert 25.0 <= h <= 100.0
        assert min(abs(h - gsd * f / 12e-6) for f in (0.009, 0.013, 0.019, 0.025)) <= 0.05
        assert 7.0 <= sc["camera"]["time_constant_ms"] <= 14.0  # microbolometers (common practice)
        cuts.add(mod["half_cut"])
    if family == "any":
        assert cuts == {True, False}


def test_same_seed_same_draw_and_families_differ():
    assert draw_scenario(SEED, "any") == draw_scenario(SEED, "any")
    anys = _draws("any", 30)
    kinds = {sc["array"]["kind"] for sc in anys}
    hemis = {sc["site"]["lat"] > 0 for sc in anys}
    cold = {sc["ground"]["sun_rise_k"] < 10 for sc in anys}
    assert kinds == {"fixed", "tracker"} and hemis == {True, False} and cold == {True, False}


def test_family_ranges():
    for sc in _draws("turned_layout"):
        lay = sc["layout"]
        assert 0.2 <= abs(lay["rotation_deg"]) <= 2.0
        assert abs(lay["scale"] - 1.0) <= 0.01
        assert np.hypot(*lay["offset_m"]) <= 1.5
    for sc in _draws("no_layout_error"):
        assert sc["layout"]["offset_m"] == [0.0, 0.0] and "rotation_deg" not in sc["layout"]
    for sc in _draws("cold_ground"):
        assert sc["ground"]["sun_rise_k"] < 10
    for sc in _draws("raised_low_sun", 6):
        assert sc["array"]["kind"] == "fixed" and 1.0 <= sc["array"]["mount_height_m"] <= 2.0
        from datetime import datetime

        elev, _ = _sun(sc["site"]["lat"], sc["site"]["lon"], datetime.fromisoformat(sc["flight"]["start"]))
        assert 12.0 <= elev <= 25.0  # pvlib solar position: a low sun
    for sc in _draws("small_site"):
        assert sc["array"]["tables_per_row"] == 1 and sc["array"]["table_rows"] <= 3


def test_tracker_angle_is_pvlibs():
    # Reference: pvlib.tracking.singleaxis (north-south axis, backtracking) at the flight start.
    import pandas as pd
    import pvlib

    for sc in _draws("tracker", 6):
        a = sc["array"]
        pos = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([pd.Timestamp(sc["flight"]["start"])]),
                                                    sc["site"]["lat"], sc["site"]["lon"])
        across = (sc["module"]["length_m"] if a["orientation"] == "portrait" else sc["module"]["width_m"]) * a["rows"] \
            + 0.02 * (a["rows"] - 1)
        tr = pvlib.tracking.singleaxis(pos["apparent_zenith"], pos["azimuth"], axis_azimuth=180, max_angle=55,
                                       backtrack=True, gcr=across / a["row_pitch_m"])
        theta = float(np.nan_to_num(tr["tracker_theta"].iloc[0]))
        assert a["tilt_deg"] == pytest.approx(max(abs(theta), 0.5), abs=0.01)
        assert a["facing"] == ("west" if theta >= 0 else "east")


def test_random_flight_replays_from_its_scenario(tmp_path):
    run = CliRunner().invoke(cli, ["simulate", "--random", str(SEED), "--family", "small_site",
                                   "--out", str(tmp_path / "a")])
    assert run.exit_code == 0, run.output
    scen = tmp_path / "a" / "scenario.toml"
    assert tomllib.loads(scen.read_text())["flight"]["id"] == f"random-small_site-{SEED}"
    run = CliRunner().invoke(cli, ["simulate", str(scen), "--seed", str(SEED), "--out", str(tmp_path / "b")])
    assert run.exit_code == 0, run.output

    def digest(p):
        return hashlib.sha256(p.read_bytes()).hexdigest()

    for name in ("thermal.tif", "truth.json", "truth_ortho.geojson"):
        a, b = tmp_path / "a" / name, tmp_path / "b" / name
        if name == "truth.json":
            ja, jb = json.loads(a.read_text()), json.loads(b.read_text())
            assert ja["layout_error"] == jb["layout_error"] and ja["defect_modules"] == jb["defect_modules"]
        else:
            assert digest(a) == digest(b), name


def test_unknown_family_is_one_line(tmp_path):
    run = CliRunner().invoke(cli, ["simulate", "--random", "1", "--family", "nope", "--out", str(tmp_path / "x")])
    assert run.exit_code != 0 and "nope" in run.output and "Traceback" not in run.output
    assert not (tmp_path / "x").exists()


def test_simulate_random_refuses_negative_seed(tmp_path):
    from pvscan.errors import SimulationError

    with pytest.raises(SimulationError):
        simulate_random(-1, tmp_path / "x")


def test_terrain_optics_and_shade_draws():
    # Documented ranges of pvscan.simulate.sampler (terrain, diffuse share, vignetting, seam
    # misalignment, relief); raised_low_sun puts half its flights near a winter noon, where pvlib's
    # solar position has the sun within 60 deg of the rows' facing azimuth (in front of them).
    from datetime import datetime

    draws = _draws("any", 30)
    slopes = [sc["terrain"]["slope_deg"] for sc in draws]
    assert all(s == 0.0 or 1.0 <= s <= 8.0 for s in slopes) and 0.0 in slopes and max(slopes) > 0
    relief = [sc["ortho"]["relief_height_fraction"] for sc in draws]
    assert all(r == 0.0 or r == 1.0 or 0.05 <= r <= 0.3 for r in relief) and len(set(relief)) > 2
    for sc in draws:
        assert 0.12 <= sc["conditions"]["diffuse_fraction"] <= 0.3
        assert 0.0 <= sc["camera"]["vignetting"] <= 0.03
        lo, hi = sc["distractors"]["seam_shift_m"]
        assert 0.02 == lo <= hi <= 0.12
    in_front = 0
    for sc in _draws("raised_low_sun", 12):
        elev, az = _sun(sc["site"]["lat"], sc["site"]["lon"], datetime.fromisoformat(sc["flight"]["start"]))
        facing = 180.0 if sc["site"]["lat"] >= 0 else 0.0
        in_front += abs((az - facing + 180.0) % 360.0 - 180.0) < 60.0
    assert in_front >= 2
