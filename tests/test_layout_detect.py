"""Layout from the image: rectangles, sub-pixel edges, lattices, layout checks, CLI.

The geometry is checked against outside references: shapely's minimum rotated rectangle
(``shapely.oriented_envelope``), the half-way point of a Gaussian-blurred step (the blur is
symmetric, so the step's half value lies at the step: ``scipy.special.erf``), and plain
trigonometry for the foreshortened module footprint (``length * cos(tilt)``).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from conftest import test_seed
from scipy.special import erf

from pvscan.io.settings import section
from pvscan.measure.layout_image.check import check_layout, corrected_layout
from pvscan.measure.layout_image.detect import _consistent, _overlaps
from pvscan.measure.layout_image.lattice import TableFit, _half_crossing
from pvscan.measure.layout_image.segment import _min_rect

SEED = test_seed()
#: The pipeline's [layout_detect] tolerances.
_CFG = dict(section(None, "layout_detect"))


def test_min_rect_matches_shapely_oriented_envelope():
    # reference: shapely.oriented_envelope (GEOS minimum-area rectangle)
    rng = np.random.default_rng(SEED)
    for _ in range(20):
        ang = rng.uniform(0, math.pi)
        a = np.array([math.cos(ang), math.sin(ang)])
        n = np.array([-a[1], a[0]])
        pts = rng.uniform(-1, 1, (200, 1)) * 12.0 * a + rng.uniform(-1, 1, (200, 1)) * 2.0 * n
        centre, axis, length, depth = _min_rect(pts)
        env = shapely.oriented_envelope(shapely.multipoints(pts))
        area = env.area
        assert length * depth == pytest.approx(area, rel=1e-9)
        assert np.allclose(centre, np.array(env.centroid.coords[0]), atol=1e-6)
        assert axis[0] >= 0  # pointing east (documented)


def test_half_crossing_finds_a_blurred_edge_to_a_tenth_of_a_pixel():
    # reference: a step blurred by a symmetric Gaussian PSF crosses its half value at the step
    # (the erf profile); pixel centres at a random phase along a rotated table give the profile.
    rng = np.random.default_rng(SEED)
    gsd = 0.05
    for _ in range(10):
        edge = rng.uniform(-0.02, 0.02)
        sigma = rng.uniform(0.4, 0.8) * gsd
        coord = rng.uniform(-0.4, 0.4, 4000)
        inside, outside = rng.uniform(35, 50), rng.uniform(20, 60)
        if abs(inside - outside) < 3:
            outside = inside + 5
        # outside toward larger coordinates
        t = outside + (inside - outside) * 0.5 * (1 - erf((coord - edge) / (sigma * math.sqrt(2))))
        t = t + rng.normal(0, 0.05, t.size)  # NETD 0.05 K (common practice for microbolometers)
        got = _half_crossing(coord, t, round(edge / gsd) * gsd, +1, gsd, _CFG["edge_step_min_k"])
        assert abs(got - edge) < 0.1 * gsd


def _fit(rng, rows=2, cols=12, tilt=25.0):
    ang = rng.uniform(-math.pi / 4, math.pi / 4)
    axis = np.array([math.cos(ang), math.sin(ang)])
    across = np.array([-axis[1], axis[0]])
    return TableFit(origin=rng.uniform(0, 100, 2) + 5e5, axis=axis, across=across, length_m=0, depth_m=0,
                    rows=rows, cols=cols, orientation="portrait", module_s_m=1.038,
                    module_w_m=2.094 * math.cos(math.radians(tilt)), gap_s_m=0.02,
                    gap_w_m=0.02 * math.cos(math.radians(tilt)), confidence=1.0, misfit=0.0, level_c=40.0,
                    contrast_k=5.0, cut=(False,) * 4, status=np.full((rows, cols), "ok", dtype=object),
                    glass=np.ones((rows, cols)))


def test_lattice_corners_are_foreshortened_footprints():
    # reference: a module tilted by beta is seen from above as length * cos(beta) (trigonometry)
    rng = np.random.default_rng(SEED)
    tilt = rng.uniform(0, 40)
    f = _fit(rng, tilt=tilt)
    c = f.corners()
    assert c.shape == (2, 12, 4, 2)
    side_w = np.hypot(*(c[:, :, 3] - c[:, :, 0]).reshape(-1, 2).T)
    side_s = np.hypot(*(c[:, :, 1] - c[:, :, 0]).reshape(-1, 2).T)
    assert np.allclose(side_w, 2.094 * math.cos(math.radians(tilt)), atol=1e-9)
    assert np.allclose(side_s, 1.038, atol=1e-9)
    # neighbours one pitch apart along the axis
    step = c[0, 1, 0] - c[0, 0, 0]
    assert np.hypot(*step) == pytest.approx(1.058, abs=1e-9)


def _table(origin, axis, length, depth, orientation="portrait", confidence=0.9, contrast=8.0, rows=2, cols=12):
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    return TableFit(origin=np.asarray(origin, float), axis=axis, across=np.array([-axis[1], axis[0]]),
                    length_m=length, depth_m=depth, rows=rows, cols=cols, orientation=orientation,
                    module_s_m=1.038, module_w_m=1.9, gap_s_m=0.02, gap_w_m=0.018, confidence=confidence,
                    misfit=0.0, level_c=40.0, contrast_k=contrast, cut=(False,) * 4,
                    status=np.full((rows, cols), "ok", dtype=object), glass=np.ones((rows, cols)))


def test_two_fits_of_one_table_overlap_by_the_rectangles_shared_area():
    # reference: two equal rectangles d apart along their long side share (L - d) * D (plane geometry)
    rng = np.random.default_rng(SEED)
    ang = rng.uniform(-math.pi, math.pi)
    axis = np.array([math.cos(ang), math.sin(ang)])
    length, depth = rng.uniform(8, 25), rng.uniform(2, 4)
    origin = rng.uniform(0, 100, 2) + 5e5
    share = 0.2
    for d in (rng.uniform(0, 0.75) * length, rng.uniform(0.85, 0.99) * length, length + 1.0):
        a = _table(origin, axis, length, depth)
        b = _table(origin + d * axis, axis, length, depth)
        shared = max(length - d, 0.0) * depth
        assert _overlaps(a, b, share) == (shared > share * length * depth)


def test_a_candidate_over_two_table_rows_is_searched_again_beside_the_fitted_one():
    # reference: plane geometry; a candidate rectangle holding two tables across its axis, the
    # lattice fitted to one: the strip left over is centred on the other table
    from pvscan.measure.layout_image.detect import _remainders
    from pvscan.measure.layout_image.segment import TableCandidate

    rng = np.random.default_rng(SEED)
    ang = rng.uniform(-math.pi / 4, math.pi / 4)
    axis = np.array([math.cos(ang), math.sin(ang)])
    across = np.array([-axis[1], axis[0]])
    length, depth, gap = rng.uniform(10, 25), rng.uniform(2, 4), rng.uniform(2, 4)
    low = rng.uniform(0, 100, 2) + 5e5  # the first table's corner
    fit = _table(low, axis, length, depth)
    other_centre = low + 0.5 * length * axis + (1.5 * depth + gap) * across
    cand_centre = low + 0.5 * length * axis + 0.5 * (2 * depth + gap) * across
    cand = TableCandidate(centre=cand_centre, axis=axis, length_m=length, depth_m=2 * depth + gap, level_c=40.0,
                          band_c=(38.0, 42.0), energy_log_thr=0.0, ground_c=30.0, area_px=1000)
    parts = _remainders(cand, fit, 1.038, _CFG["remainder_clear_m"])
    assert len(parts) == 1
    p = parts[0]
    # across the axis, the strip holds the whole other table and stays off the fitted one
    w = float((p.centre - low) @ across)
    assert w - 0.5 * p.depth_m > depth  # beyond the fitted table's far edge
    assert w - 0.5 * p.depth_m <= depth + gap  # ... and before the other table's near edge
    assert w + 0.5 * p.depth_m >= float((other_centre - low) @ across) + 0.5 * depth - 1e-9
    assert float((p.centre - low) @ axis) == pytest.approx(0.5 * length)
    assert p.length_m == pytest.approx(length)


def test_lattices_on_ground_or_across_the_plant_are_not_tables():
    # reference: the plant is one orientation and one kind of glass-ground contrast (common
    # practice); a fit in the other orientation or with a fraction of the plant's contrast is not
    rng = np.random.default_rng(SEED)
    tables = [_table(rng.uniform(0, 100, 2), (1.0, 0.0), 12.0, 3.6, contrast=rng.uniform(6, 11)) for _ in range(5)]
    turned = _table((0.0, 0.0), (1.0, 0.0), 4.0, 6.0, orientation="landscape", rows=6, cols=2)
    faint = _table((0.0, 50.0), (1.0, 0.0), 12.0, 3.6, contrast=0.2 * float(np.median([t.contrast_k for t in tables])))
    kept = _consistent([*tables, turned, faint], 0.25)
    assert kept == tables


def _modules_gdf(fits, prefix="D"):
    import geopandas as gpd

    rows = []
    for k, f in enumerate(fits, 1):
        c = f.corners()
        for r in range(f.rows):
            for j in range(f.cols):
                rows.append({"module_id": f"{prefix}{k}-R{r + 1}-C{j + 1:02d}", "table_id": f"{prefix}{k}",
                             "table_row": r + 1, "table_col": j + 1, "status": "ok",
                             "geometry": shapely.polygons(c[r, j])})
    return gpd.GeoDataFrame(rows, geometry="geometry", crs="EPSG:32633")


def test_check_finds_missing_modules_moved_tables_and_keeps_ids():
    rng = np.random.default_rng(SEED)
    fits = [_fit(rng) for _ in range(3)]
    for k, f in enumerate(fits):
        f.origin = np.array([5e5, 5.7e6 + 8.0 * k])
        f.axis = np.array([1.0, 0.0])
        f.across = np.array([0.0, 1.0])
    detected = _modules_gdf(fits, "D")
    layout = _modules_gdf(fits, "L")
    layout["string_id"] = [f"S{i // 6}" for i in range(len(layout))]
    # the drawing sits 0.3 m off as a whole; one table moved by 0.5 m more; two modules not drawn;
    # one drawn module has no glass (a module removed from the plant)
    common = np.array([0.3, -0.2])
    layout["geometry"] = layout.geometry.translate(*(-common))
    moved = layout["table_id"] == "L2"
    layout.loc[moved, "geometry"] = layout.loc[moved, "geometry"].translate(-0.5, 0.0)
    drop = rng.choice(np.flatnonzero(~moved.to_numpy()), 2, replace=False)
    layout = layout.drop(index=drop).reset_index(drop=True)
    gone = int(rng.integers(len(detected)))
    detected = detected.drop(index=gone).reset_index(drop=True)
    settings = {"check_match_m": 0.5, "check_search_m": 3.0, "check_move_m": 0.15, "check_turn_deg": 0.5}
    chk = check_layout(layout, detected, settings)
    counts = chk.counts()
    assert counts["missing_from_layout"] == 2
    assert counts["no_module_found"] == 1
    assert counts["table_moved"] == 1
    assert counts["table_turned"] == 0
    assert chk.common_shift_m == pytest.approx(tuple(common), abs=1e-6)
    t2 = chk.tables.set_index("table_id").loc["L2"]
    assert (t2.dx_m, t2.dy_m) == pytest.approx((0.5, 0.0), abs=1e-6)
    fixed = corrected_layout(layout, detected, chk)
    assert len(fixed) == len(detected)
    assert (fixed["source"] == "layout").sum() == len(layout) - 1
    kept = fixed[fixed["source"] == "layout"]
    assert kept["module_id"].str.startswith("L").all()
    assert kept["string_id"].notna().all()


def _run(args):
    from click.testing import CliRunner

    from pvscan.cli.main import cli

    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture(scope="module")
def clean_flight(tmp_path_factory):
    """A small simulated plant without defects or distractors (seeded by PVSCAN_TEST_SEED)."""
    from pvscan.simulate import simulate_flight

    scenario = {"site": {"name": "Test plant Clearfield (invented)", "lon": 13.42, "lat": 52.51},
                "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 10, "row_pitch_m": 6.5,
                          "rotation_deg": 7.0}}
    out = tmp_path_factory.mktemp("layout") / "flight"
    simulate_flight(scenario, out, seed=SEED)
    return out


def test_cli_detect_writes_modules_and_tables_with_documented_ids(clean_flight, tmp_path):
    import geopandas as gpd

    out = tmp_path / "layout.gpkg"
    res = _run(["layout", "detect", clean_flight / "flight.toml", "--out", out])
    assert res.exit_code == 0, res.output + res.stderr
    assert "tables" in res.output
    mods = gpd.read_file(out, layer="modules")
    tabs = gpd.read_file(out, layer="tables")
    assert len(mods) > 0 and len(tabs) > 0
    assert mods["module_id"].is_unique
    assert mods["module_id"].str.fullmatch(r"D\d\d-\d\d-R\d+-C\d\d").all()
    assert set(mods["table_id"]) == set(tabs["table_id"])
    assert (mods["table_row"] >= 1).all() and (mods["table_col"] >= 1).all()
    assert mods["status"].isin(["ok", "cut", "nodata"]).all()
    # a second run refuses to replace the file without --overwrite: one line, exit 1
    again = _run(["layout", "detect", clean_flight / "flight.toml", "--out", out])
    assert again.exit_code == 1
    assert len(again.stderr.strip().splitlines()) == 1 and "overwrite" in again.stderr


def test_cli_detect_refuses_a_non_geopackage_name(clean_flight, tmp_path):
    out = tmp_path / "layout.geojson"
    res = _run(["layout", "detect", clean_flight / "flight.toml", "--out", out])
    assert res.exit_code == 1
    assert "GeoPackage" in res.stderr and "Traceback" not in res.stderr
    assert not out.exists()


def test_cli_check_writes_findings_and_fixed_layout(clean_flight, tmp_path):
    import geopandas as gpd

    out = tmp_path / "check.gpkg"
    res = _run(["layout", "check", clean_flight / "flight.toml", "--out", out, "--fix"])
    assert res.exit_code == 0, res.output + res.stderr
    assert "missing from the layout" in res.output
    fixed = gpd.read_file(out, layer="layout")
    assert fixed["source"].isin(["layout", "detected"]).all()
    # matched modules carry the drawing's ids (the simulator's TB<row>-<table>-R<r>-C<cc>)
    kept = fixed[fixed["source"] == "layout"]
    assert kept["module_id"].str.startswith("TB").all()


def _lattice_fit(origin, axis, cols, rows, mod_w, gap=0.02, mod_s=1.038):
    across = np.array([-axis[1], axis[0]])
    length = cols * (mod_s + gap) - gap
    depth = rows * (mod_w + gap) - gap
    return TableFit(origin=origin, axis=axis, across=across, length_m=length, depth_m=depth, rows=rows, cols=cols,
                    orientation="portrait", module_s_m=mod_s, module_w_m=mod_w, gap_s_m=gap, gap_w_m=gap,
                    confidence=0.8, misfit=0.02, level_c=40.0, contrast_k=5.0, cut=(False,) * 4,
                    status=np.full((rows, cols), "ok", dtype=object), glass=np.ones((rows, cols)))


def test_two_fits_of_one_split_table_join_and_neighbouring_tables_do_not():
    # reference: plane geometry of a drawn lattice (module 1.038 m, gaps 0.02 m, common practice
    # for 60-cell modules); tables of a row stand about a pitch (~1 m) apart (common practice)
    from pvscan.measure.layout_image.detect import _join_rows

    rng = np.random.default_rng(SEED)
    for i in range(10):
        ang = rng.uniform(-math.pi / 4, math.pi / 4)
        axis = np.array([math.cos(ang), math.sin(ang)])
        across = np.array([-axis[1], axis[0]])
        cols, rows = int(rng.integers(12, 30)), int(rng.integers(1, 4))
        # portrait and landscape modules in turn (module 1.038 x 2.094 m)
        mod_s, mod_long = (1.038, 2.094) if i % 2 == 0 else (2.094, 1.038)
        mod_w = mod_long * math.cos(math.radians(rng.uniform(10, 40)))
        pitch = mod_s + 0.02
        origin = rng.uniform(0, 100, 2) + 5e5
        # a shadow splits the table; each part fitted with up to two modules of the other
        # (0 = the parts just meet) and a few millimetres of error
        k = int(rng.integers(4, cols - 4))
        over = int(rng.integers(0, 3))
        err = rng.normal(0, 0.005, 4)
        a = _lattice_fit(origin + err[0] * axis + err[1] * across, axis, k + over, rows, mod_w, mod_s=mod_s)
        b = _lattice_fit(origin + (k * pitch + err[2]) * axis + err[3] * across, axis, cols - k, rows, mod_w,
                         mod_s=mod_s)
        got = _join_rows([b, a], _CFG)
        assert len(got) == 1
        j = got[0]
        assert (j.cols, j.rows) == (cols, rows)
        assert np.allclose(j.corners()[0, 0, 0], origin, atol=0.02)
        far = origin + (cols * pitch - 0.02) * axis + (rows * (mod_w + 0.02) - 0.02) * across
        assert np.allclose(j.corners()[-1, -1, 2], far, atol=0.02)
        # the next table of the row, a metre beyond the end, and the next table row: apart (also
        # for landscape modules, whose half pitch is more than the metre between tables)
        c = _lattice_fit(origin + (cols * pitch - 0.02 + rng.uniform(0.9, 1.1)) * axis, axis, cols, rows, mod_w,
                         mod_s=mod_s)
        d = _lattice_fit(origin + (rows * (mod_w + 0.02) + rng.uniform(2, 5)) * across, axis, cols, rows, mod_w,
                         mod_s=mod_s)
        assert len(_join_rows([j, c, d], _CFG)) == 3


def test_a_part_overlapping_a_larger_fit_of_its_table_adds_its_modules():
    # reference: plane geometry of a drawn lattice; a table fitted as two parts on one lattice
    # that overlap by more than the overlap rule's share of the smaller one (the same table
    # found twice, in part): the plant keeps the whole table, not only the larger part
    from pvscan.io.settings import load_pipeline, section
    from pvscan.measure.layout_image.detect import _combine

    cfg = dict(section(load_pipeline(), "layout_detect"))
    rng = np.random.default_rng(SEED + 1)
    pitch = 2.094 + 0.02  # landscape modules along the table
    for _ in range(6):
        ang = rng.uniform(-math.pi / 4, math.pi / 4)
        axis = np.array([math.cos(ang), math.sin(ang)])
        cols, rows = int(rng.integers(8, 16)), int(rng.integers(2, 5))
        mod_w = 1.038 * math.cos(math.radians(rng.uniform(10, 35)))
        origin = rng.uniform(0, 100, 2) + 5e5
        small = int(rng.integers(3, 5))
        over = small - 1  # the part shares all but one of its columns with the larger one
        big = _lattice_fit(origin, axis, cols - 1, rows, mod_w, mod_s=2.094)
        part = _lattice_fit(origin + (cols - small) * pitch * axis, axis, small, rows, mod_w, mod_s=2.094)
        assert _overlaps(big, part, float(cfg["overlap_share"]))  # the case the overlap rule sees
        assert over >= 2
        got = _combine([big, part], cfg)
        assert len(got) == 1 and (got[0].cols, got[0].rows) == (cols, rows)
        assert np.allclose(got[0].origin, origin, atol=1e-6)
