"""Co-registration judged on module evidence (pvscan.measure.register.fit / evidence).

Flights are simulated (pvscan.simulate) and their layout file is turned, scaled or shifted
about the site centre with shapely.affinity; the truth stays where the modules are in the
ortho, so the correction that puts the layout back is known exactly. The seed comes from
PVSCAN_TEST_SEED (any seed must pass).
"""
from __future__ import annotations

import math

import geopandas as gpd
import numpy as np
import pytest
import shapely.affinity as aff
from conftest import test_seed

from pvscan.io.layout import read_layout
from pvscan.io.manifest import load_flight
from pvscan.io.ortho import open_orthos
from pvscan.io.settings import load_pipeline
from pvscan.measure.register import Placement, apply_placement, expected_module_apparent_c, register_layout
from pvscan.measure.register.evidence import sun_vector
from pvscan.simulate import simulate_flight

SEED = test_seed()
#: "within 3 cm of none" on a layout that is right (the tolerance a correct layout must keep).
NO_SHIFT_TOL_M = 0.03


def _fixed(**over):
    sc = {"site": {"name": "Register test site (invented)", "lon": -4.05, "lat": 39.23},
          "flight": {"start": "2026-06-14T10:40:00+02:00"},
          "array": {"kind": "fixed", "table_rows": 4, "tables_per_row": 2, "rows": 2, "cols": 16,
                    "row_pitch_m": 7.0, "rotation_deg": 3.0, "mount_height_m": 0.8},
          "layout": {"offset_m": [0.0, 0.0]}}
    for k, v in over.items():
        sc.setdefault(k, {}).update(v)
    return sc


def _tracker_hot():
    """Flat single-axis tracker rows raised 1.8 m over hot bare ground, early afternoon."""
    return {"site": {"name": "Tracker test field (invented)", "lon": -4.05, "lat": 39.23},
            "flight": {"start": "2026-06-14T14:10:00+02:00"},
            "array": {"kind": "tracker", "facing": "west", "table_rows": 6, "tables_per_row": 2, "rows": 1,
                      "cols": 20, "tilt_deg": 5.0, "row_pitch_m": 5.5, "modules_per_string": 10,
                      "mount_height_m": 1.8},
            "ground": {"sun_rise_k": 32.0, "shade_rise_k": 2.0},
            "layout": {"offset_m": [0.0, 0.0]},
            "conditions": {"poa_irradiance_w_m2": 900.0, "ambient_c": 30.0, "wind_m_s": 1.5}}


def _transform_layout(flight_dir, rot_deg=0.0, scale=1.0, dx=0.0, dy=0.0):
    """Turn / scale / shift the layout file about the centre of its modules (in UTM)."""
    lay = next(p for p in flight_dir.iterdir() if p.name.startswith("layout."))
    g = gpd.read_file(lay)
    utm = g.estimate_utm_crs()
    gu = g.to_crs(utm)
    c = gu.union_all().centroid
    geo = gu.geometry.apply(lambda p: aff.translate(aff.scale(aff.rotate(p, rot_deg, origin=c), scale, scale,
                                                                  origin=c), dx, dy))
    lay.unlink()
    gu.set_geometry(geo).to_crs(g.crs).to_file(lay, driver="GeoJSON")


def _register(flight_dir, **kw):
    fl = load_flight(flight_dir / "flight.toml")
    st = load_pipeline()
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        c = mods.to_crs(4326).union_all().centroid
        sun = sun_vector(c.x, c.y, fl.flight.start)
        expected = expected_module_apparent_c(fl, st, strict=False)
        reg = register_layout(o, mods, st, sun=sun, expected_apparent_c=expected, **kw)
    return reg, mods


def _truth_residual_m(flight_dir, reg, mods) -> float:
    """Largest distance between a module's placed centre and where the truth has it [m]."""
    truth = gpd.read_file(flight_dir / "truth.geojson").to_crs(mods.crs).set_index("module_id")
    placed = apply_placement(mods, reg.placement if reg.applied else None).set_index("module_id")
    tc = truth.loc[placed.index].geometry.centroid
    pc = placed.geometry.centroid
    return float(np.max(np.hypot(tc.x.to_numpy() - pc.x.to_numpy(), tc.y.to_numpy() - pc.y.to_numpy())))


@pytest.fixture(scope="module")
def fixed_flight(tmp_path_factory):
    d = tmp_path_factory.mktemp("fixed") / "flight"
    simulate_flight(_fixed(), d, seed=SEED)
    return d


def test_layout_right_is_not_moved(fixed_flight):
    """A layout that is right: the fitted correction is within 3 cm of none everywhere."""
    reg, mods = _register(fixed_flight)
    assert reg.status == "ok", reg.message
    move = reg.placement.displacement_max(mods.total_bounds) if reg.applied else 0.0
    assert move <= NO_SHIFT_TOL_M, reg.message
    assert reg.evidence["drawn"]["ok"]
    # the placement one module pitch along or across the rows fits clearly worse: decisive
    assert reg.evidence["pitch"]["decisive"], reg.evidence["pitch"]
    assert reg.evidence["pitch"]["lowest_ratio"] > reg.evidence["pitch"]["limit"]
    # nor does the local refinement move any table more than that
    assert _truth_residual_m(fixed_flight, reg, mods) <= NO_SHIFT_TOL_M, reg.message


def _truth_ortho_rms_m(flight_dir, placed) -> float:
    """RMS distance between placed module centres and the modules in the ortho [m]."""
    truth = gpd.read_file(flight_dir / "truth_ortho.geojson").to_crs(placed.crs).set_index("module_id")
    p = placed.set_index("module_id")
    tc = truth.loc[p.index].geometry.centroid
    pc = p.geometry.centroid
    return float(np.sqrt(np.mean((tc.x.to_numpy() - pc.x.to_numpy()) ** 2 + (tc.y.to_numpy() - pc.y.to_numpy()) ** 2)))


def test_tables_displaced_one_by_one_are_refined_locally(tmp_path):
    """Each table of the layout displaced on its own (photogrammetric distortion, 6 cm RMS,
    the simulator's layout.local_rms_m) after a shift and a turn: the per-table refinement
    brings the modules closer to where the ortho has them than the global fit alone, and the
    record says how many tables it refined."""
    from dataclasses import replace

    d = tmp_path / "flight"
    simulate_flight(_fixed(layout={"offset_m": [0.3, -0.2], "rotation_deg": 0.3, "local_rms_m": 0.06}), d, seed=SEED)
    reg, mods = _register(d)
    assert reg.status == "ok" and reg.applied, reg.message
    local = reg.to_dict()["local"]
    assert local["applied"] and local["tables_refined"] >= 1, local
    whole = _truth_ortho_rms_m(d, apply_placement(mods, reg.placement))
    global_only = _truth_ortho_rms_m(d, apply_placement(mods, replace(reg.placement, tables=())))
    assert whole < global_only, (whole, global_only, local)
    # a third of a cell (16-17 cm cells of a 1.0 x 2.1 m module of 6 x 12 cells)
    assert whole < 0.055, (whole, local)
    assert len(reg.to_dict()["tables"]) == local["tables_refined"]


@pytest.mark.parametrize("rot_deg,scale,dx,dy", [(1.0, 1.0, 0.0, 0.0), (-0.5, 1.008, 0.4, -0.3)])
def test_turned_and_scaled_layout_is_put_back(fixed_flight, tmp_path, rot_deg, scale, dx, dy):
    """A small site (one correlation block at the configured size) whose layout is turned
    (and scaled, shifted): the fit undoes it to a few centimetres on every module."""
    import shutil

    d = tmp_path / "flight"
    shutil.copytree(fixed_flight, d)
    _transform_layout(d, rot_deg, scale, dx, dy)
    reg, mods = _register(d)
    assert reg.status == "ok" and reg.applied, reg.message
    assert reg.placement.theta_deg == pytest.approx(-rot_deg, abs=0.05)
    # a turn of rot_deg moves the far modules by decimetres; the fit leaves < 6 cm
    # (the measured footprint keeps 6-8 cm from the module's edge: [zonal] edge_margin_u/v)
    assert _truth_residual_m(d, reg, mods) < 0.06, reg.message
    ev = reg.to_dict()["evidence"]
    assert ev["proposals"] and ev["used"] == "proposal"


def _pitch_along_rows_m(flight_dir) -> tuple[float, float]:
    """Median vector from a module to the next one along its table row, from the truth [m]."""
    t = gpd.read_file(flight_dir / "truth.geojson")
    t = t.to_crs(t.estimate_utm_crs())
    c = t.geometry.centroid
    t = t.assign(x=c.x, y=c.y).sort_values(["table_id", "table_row", "table_col"])
    same = (t["table_id"].shift(-1) == t["table_id"]) & (t["table_row"].shift(-1) == t["table_row"])
    dx = (t["x"].shift(-1) - t["x"])[same]
    dy = (t["y"].shift(-1) - t["y"])[same]
    return float(np.median(dx)), float(np.median(dy))


@pytest.mark.parametrize("pitches", [1.0, -1.0])
def test_layout_one_module_pitch_off_along_the_rows_is_put_back(fixed_flight, tmp_path, pitches):
    """A layout one module pitch off along its rows fits every module but those at the table
    ends: the ends (ground beyond them, glass left uncovered) decide, and the fit puts every
    module back (a placement one pitch off would leave every module ~1 m from its own)."""
    import shutil

    d = tmp_path / "flight"
    shutil.copytree(fixed_flight, d)
    px, py = _pitch_along_rows_m(d)
    _transform_layout(d, 0.0, 1.0, pitches * px + 0.05, pitches * py - 0.04)
    reg, mods = _register(d)
    assert reg.status == "ok" and reg.applied, reg.message
    # the measured footprint keeps 6-8 cm from the module's edge ([zonal] edge_margin_u/v)
    assert _truth_residual_m(d, reg, mods) < 0.06, reg.message


def test_shadowed_tracker_over_hot_ground_keeps_a_right_layout(tmp_path):
    """Flat tracker rows casting shadows on hot ground, layout right: no shift is invented
    (today's correlation took the shadow for the row and moved the layout)."""
    d = tmp_path / "flight"
    simulate_flight(_tracker_hot(), d, seed=SEED)
    reg, mods = _register(d)
    assert reg.status == "ok", reg.message
    move = reg.placement.displacement_max(mods.total_bounds) if reg.applied else 0.0
    assert move <= NO_SHIFT_TOL_M, reg.message


def test_forced_shift_is_used_and_judged(fixed_flight, tmp_path):
    """--shift DX DY: the given offset is applied as given and judged by the same evidence."""
    import shutil

    d = tmp_path / "flight"
    shutil.copytree(fixed_flight, d)
    _transform_layout(d, 0.0, 1.0, 0.5, -0.35)
    reg, mods = _register(d, forced_shift=(-0.5, 0.35))
    assert reg.applied and reg.shift_m == pytest.approx((-0.5, 0.35), abs=1e-9)
    assert reg.status == "ok"
    assert _truth_residual_m(d, reg, mods) < 0.01


def test_placement_algebra():
    """Placement: rotation about the centre keeps the centre; 90 deg maps east to north."""
    p = Placement(1.0, 2.0, 90.0, 2.0, 10.0, 20.0)
    x, y = p.apply(np.array([10.0, 11.0]), np.array([20.0, 20.0]))
    assert x == pytest.approx([11.0, 11.0], abs=1e-12)
    assert y == pytest.approx([22.0, 24.0], abs=1e-12)
    assert math.isclose(p.displacement_max((10, 20, 10, 20)), math.hypot(1, 2))


def test_sun_vector_matches_pvlib_noon():
    """Solar noon in the northern mid-latitudes: the sun is due south (pvlib SPA; the
    equation of time at mid-June is near zero, so 12:00 local mean solar time at -4.05 deg
    is ~12:16 UTC)."""
    from datetime import UTC, datetime

    e, n, el = sun_vector(-4.05, 39.23, datetime(2026, 6, 14, 12, 16, tzinfo=UTC))
    assert n == pytest.approx(-1.0, abs=0.01) and abs(e) < 0.1
    # noon elevation = 90 - lat + declination (23.3 deg mid-June, from memory)
    assert el == pytest.approx(90 - 39.23 + 23.3, abs=0.6)


def test_row_pitch_of_the_layout(fixed_flight):
    """The pitch between rows of tables read from the layout is the simulated plant's
    ``row_pitch_m`` (7.0 m, the scenario's own figure) and points across the rows."""
    from pvscan.measure.register.fit import _pitches, _row_pitch

    fl = load_flight(fixed_flight / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
    along = _pitches(mods)[0]
    rp = _row_pitch(mods, along)
    assert rp is not None
    assert float(np.hypot(*rp)) == pytest.approx(_fixed()["array"]["row_pitch_m"], rel=0.01)
    # across the rows: perpendicular to the module pitch along them (cos < 0.05)
    assert abs(float(rp @ along)) / (np.hypot(*rp) * np.hypot(*along)) < 0.05
    # one row of tables: no pitch across the rows
    one_row = mods[mods["table_id"] == mods["table_id"].iloc[0]]
    assert _row_pitch(one_row, along) is None


@pytest.mark.parametrize("layout", [
    # turned 1 deg and scaled 0.8 % (the limits a layout error reaches on the sampler's
    # turned_layout family), tables displaced 5 cm RMS each
    {"offset_m": [0.4, -0.3], "rotation_deg": 1.0, "scale": 1.008, "local_rms_m": 0.05},
    # tables displaced 12 cm RMS each: no similarity puts every footprint on glass
    {"offset_m": [0.3, -0.2], "rotation_deg": 0.5, "local_rms_m": 0.12},
])
def test_distorted_layout_is_placed_right_or_refused(tmp_path, layout):
    """Right on every flight, or say so: a layout turned, scaled and displaced table by table
    is either placed with its modules within 8 cm RMS of where the ortho shows them (against
    truth_ortho.geojson; the measured footprint keeps 6-8 cm from the module's edge, [zonal]
    edge_margin_u/v, so its pixels stay on the module's glass), or the registration fails or is
    ambiguous, which fails the registration validity check. Never placed wrong and called
    right (an earlier version put layouts one or two module pitches off along the rows and
    called the flight valid)."""
    d = tmp_path / "flight"
    simulate_flight(_fixed(layout=layout), d, seed=SEED)
    reg, mods = _register(d)
    if reg.status == "ok":
        rms = _truth_ortho_rms_m(d, apply_placement(mods, reg.placement if reg.applied else None))
        assert rms < 0.08, (rms, reg.message)
    else:
        assert reg.status in ("failed", "ambiguous"), reg.message
        from pvscan.measure.validity import registration_check

        assert registration_check(reg, load_pipeline())["passed"] is False, reg.message


class _CountingOrthos:
    """An ortho set that counts the chunk caches opened on it (or, with ``cache=False``, has
    none: every window is read on its own)."""

    def __init__(self, orthos, cache=True):
        self._orthos, self.caches = orthos, 0
        if cache:
            self.window_cache = self._counted

    def __getattr__(self, name):
        if name == "window_cache":
            raise AttributeError(name)
        return getattr(self._orthos, name)

    def _counted(self, *args, **kwargs):
        self.caches += 1
        return self._orthos.window_cache(*args, **kwargs)


def test_one_chunk_cache_serves_the_whole_registration(fixed_flight):
    """Every module sample of one registration reads through one chunk cache, and the result is
    the one of reading every window on its own. Reference: the simulator's truth (the layout is
    right: within 3 cm of none)."""
    fl = load_flight(fixed_flight / "flight.toml")
    st = load_pipeline()
    out = []
    for cache in (True, False):
        with open_orthos(fl.flight.orthos, fl.ortho) as o:
            mods = read_layout(fl, o.crs)
            c = mods.to_crs(4326).union_all().centroid
            counting = _CountingOrthos(o, cache=cache)
            reg = register_layout(counting, mods, st, sun=sun_vector(c.x, c.y, fl.flight.start),
                                  expected_apparent_c=expected_module_apparent_c(fl, st, strict=False))
        out.append((reg, counting.caches))
    (shared, n_shared), (single, n_single) = out
    assert n_shared == 1 and n_single == 0
    assert shared.to_dict() == single.to_dict()
    assert shared.status == "ok", shared.message
    assert _truth_residual_m(fixed_flight, shared, mods) <= NO_SHIFT_TOL_M, shared.message
