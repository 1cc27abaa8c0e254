"""Zonal statistics against an independent computation.

The reference masks pixel centres with shapely polygons built from the module frame
(``shapely.contains_xy``) and reduces each mask with numpy (``numpy.median``,
``numpy.percentile`` with its default linear interpolation, ``numpy.mean``/``numpy.std``).
pvscan's order statistics are computed on values quantised to 0.01 K, so they must equal
numpy's on the quantised values (to float rounding) and be within half a step (0.005 K) of
numpy's on the raw values.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import shapely
from rasterio.windows import Window

from pvscan.io.ortho import open_orthos
from pvscan.measure.zonal import TABLE_COLUMNS, ZonalStats, measure_window, zonal_stats

GSD = 0.05
ORIGIN = (500_000.0, 4_000_000.0)
#: Half a quantisation step [K]: the largest change quantising can make to an order statistic.
HALF_Q = 0.005 + 1e-9


def _settings(**over):
    base = {"edge_margin_u": 0.04, "edge_margin_v": 0.06, "block_px": 1024, "quantum_k": 0.01}
    base.update(over)
    return base


def _rect(fr, u0, u1, v0, v1):
    """shapely polygon of the local box [u0,u1] x [v0,v1] of one frame (independent of pvscan)."""
    x0, y0, ux, uy, vx, vy = fr
    pts = [(x0 + u * ux + v * vx, y0 + u * uy + v * vy) for u, v in ((u0, v0), (u1, v0), (u1, v1), (u0, v1))]
    return shapely.Polygon(pts)


def _reference(data, fr, grid, mu, mv, centres_xy):
    """Independent statistics of one module: shapely masks + numpy reductions."""
    n_along, n_across, nsub = grid
    x, y = centres_xy
    # crop to the module's bounding box first (speed only; contains_xy decides)
    minx, miny, maxx, maxy = _rect(fr, 0, 1, 0, 1).bounds
    near = np.flatnonzero((x.ravel() >= minx) & (x.ravel() <= maxx) & (y.ravel() >= miny) & (y.ravel() <= maxy))
    vals = data.ravel()[near]
    xs, ys = x.ravel()[near], y.ravel()[near]
    foot = shapely.contains_xy(_rect(fr, mu, 1 - mu, mv, 1 - mv), xs, ys)
    fv = vals[foot]
    good = fv[np.isfinite(fv)]
    out = {"n_fp": int(foot.sum()), "n_valid": good.size, "values": good}
    out["cells"] = {}
    for i in range(n_along):
        for j in range(n_across):
            u0, u1 = max(i / n_along, mu), min((i + 1) / n_along, 1 - mu)
            v0, v1 = max(j / n_across, mv), min((j + 1) / n_across, 1 - mv)
            if u1 <= u0 or v1 <= v0:
                out["cells"][i, j] = np.array([])
                continue
            m = shapely.contains_xy(_rect(fr, u0, u1, v0, v1), xs, ys)
            cv = vals[m]
            out["cells"][i, j] = cv[np.isfinite(cv)]
    out["subs"] = {}
    for k in range(nsub):
        v0, v1 = max(k / nsub, mv), min((k + 1) / nsub, 1 - mv)
        m = shapely.contains_xy(_rect(fr, mu, 1 - mu, v0, v1), xs, ys)
        sv = vals[m]
        out["subs"][k] = sv[np.isfinite(sv)]
    return out


def _q(a):
    return np.rint(np.asarray(a, dtype=np.float64) * 100.0) / 100.0


def _check_order_stats(got_median, got_p95, values):
    """got vs numpy on quantised values (float rounding) and on raw values (half a step)."""
    if values.size == 0:
        assert np.isnan(got_median) and np.isnan(got_p95)
        return
    np.testing.assert_allclose(got_median, np.median(_q(values)), atol=1e-6)
    np.testing.assert_allclose(got_p95, np.percentile(_q(values), 95), atol=1e-6)
    assert abs(got_median - np.median(values)) <= HALF_Q + 1e-6
    assert abs(got_p95 - np.percentile(values, 95)) <= HALF_Q + 1e-6


@pytest.fixture
def scene(write_tif, rng, make_modules):
    """A 360 x 420 px ortho with smooth gradient + noise + hot spots + NaN holes, and 14
    modules at assorted rotations (0, 90 and odd angles) and sub-pixel offsets."""
    h, w = 360, 420
    rr, cc = np.mgrid[0:h, 0:w]
    data = 25.0 + 0.01 * cc + 0.005 * rr + rng.normal(0.0, 0.6, (h, w))
    data[100:110, 60:75] += 12.0  # a hot patch
    data[rng.random((h, w)) < 0.03] = np.nan  # scattered dropouts
    data[250:262, 300:330] = np.nan  # a hole
    data = data.astype("float32")
    path = write_tif("scene.tif", data, gsd=GSD, origin=ORIGIN, block=64)
    n = 14
    angles = np.array([0, 90, 17.3, 45, 133.7, 200.1, 271.9, 305, 12, 78, 160, 250, 330, 5.5])
    # one module per slot of a 4 x 4 grid of 5.25 m x 4.5 m slots (14 of 16), jittered:
    # footprints never overlap (diagonal 2.25 m)
    slot = rng.permutation(16)[:n]
    cx = ORIGIN[0] + (slot % 4 + 0.5) * (w * GSD / 4) + rng.uniform(-0.6, 0.6, n)
    cy = ORIGIN[1] - (slot // 4 + 0.5) * (h * GSD / 4) + rng.uniform(-0.5, 0.5, n)
    # place by centre: lower-left corner = centre - (U + V) / 2
    t = np.radians(angles)
    ln, wd = 2.0 + rng.uniform(-0.1, 0.1, n), 1.0 + rng.uniform(-0.05, 0.05, n)
    x0 = cx - 0.5 * (ln * np.cos(t) - wd * np.sin(t))
    y0 = cy - 0.5 * (ln * np.sin(t) + wd * np.cos(t))
    mods = make_modules(x0, y0, angles, ln, wd)
    return path, data, mods


def test_against_shapely_numpy_reference(scene, module_spec, centres):
    path, data, mods = scene
    grid = (module_spec.n_along, module_spec.n_across, module_spec.bypass_diodes)
    mu, mv = 0.04, 0.06
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec, _settings(edge_margin_u=mu, edge_margin_v=mv))
        transform = o.tiles[0].transform
    assert isinstance(zs, ZonalStats)
    assert list(zs.table.index) == list(mods.index)
    assert zs.cell_median.shape == (len(mods), 12, 6) and zs.sub_median.shape == (len(mods), 3)
    xy = centres(transform, data.shape)
    frames = mods[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy()
    for i, fr in enumerate(frames):
        ref = _reference(data, fr, grid, mu, mv, xy)
        row = zs.table.iloc[i]
        vals = ref["values"]
        assert ref["n_valid"] > 100  # every module lies inside the ortho
        assert row["n_pixels"] == ref["n_valid"]
        assert row["valid_fraction"] == pytest.approx(ref["n_valid"] / ref["n_fp"], abs=1e-12)
        assert row["tile"] == 0
        # exact statistics (float64 sums over float32 data)
        assert row["t_mean_c"] == pytest.approx(np.mean(vals.astype(float)), abs=1e-9)
        assert row["t_std_k"] == pytest.approx(np.std(vals.astype(float)), abs=1e-9)
        _check_order_stats(row["t_median_c"], row["t_p95_c"], vals)
        assert row["t_max_c"] == pytest.approx(_q(vals).max(), abs=1e-6)
        assert row["t_min_c"] == pytest.approx(_q(vals).min(), abs=1e-6)
        for (ci, cj), cv in ref["cells"].items():
            assert zs.cell_count[i, ci, cj] == cv.size, (i, ci, cj)
            _check_order_stats(zs.cell_median[i, ci, cj], zs.cell_p95[i, ci, cj], cv)
        for k, sv in ref["subs"].items():
            _check_order_stats(zs.sub_median[i, k], zs.sub_p95[i, k], sv)
        assert zs.cell_count[i].sum() == ref["n_valid"]


def test_hot_patch_lands_in_the_right_cell(write_tif, make_modules, module_spec):
    # Module 2.0 x 1.0 m rotated 30 degrees; heat the pixels whose centres fall in cell (3, 4).
    data = np.full((120, 120), 30.0, dtype="float32")
    path_cold = write_tif("cold.tif", data)
    mods = make_modules(ORIGIN[0] + 2.5, ORIGIN[1] - 5.0, 30.0)
    fr = mods[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy()[0]
    rows, cols = np.mgrid[0:120, 0:120]
    x = ORIGIN[0] + GSD * (cols + 0.5)
    y = ORIGIN[1] - GSD * (rows + 0.5)
    cell = _rect(fr, 3 / 12, 4 / 12, 4 / 6, 5 / 6)
    hot = shapely.contains_xy(cell, x.ravel(), y.ravel()).reshape(data.shape)
    data2 = data.copy()
    data2[hot] = 45.0
    path = write_tif("hot.tif", data2)
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec, _settings())
    with open_orthos(path_cold) as o:
        cold = zonal_stats(o, mods, module_spec, _settings())
    assert zs.cell_median[0, 3, 4] == pytest.approx(45.0)
    others = np.ones((12, 6), bool)
    others[3, 4] = False
    assert np.allclose(zs.cell_median[0][others], 30.0)
    assert zs.sub_p95[0, 2] == pytest.approx(45.0)  # v in [4/6, 5/6] -> substring 2
    assert np.allclose(zs.sub_median[0], 30.0)
    assert zs.table["t_max_c"].iloc[0] == pytest.approx(45.0)
    assert np.allclose(cold.cell_median[0], 30.0)


def test_block_size_prefetch_and_dask_agree(scene, module_spec):
    path, _, mods = scene
    with open_orthos(path) as o:
        big = zonal_stats(o, mods, module_spec, _settings(block_px=1024))
        small = zonal_stats(o, mods, module_spec, _settings(block_px=64), prefetch=False)
        small_pf = zonal_stats(o, mods, module_spec, _settings(block_px=64), prefetch=True)
        dsk = zonal_stats(o, mods, module_spec, _settings(block_px=64), scheduler="synchronous")
        pool = zonal_stats(o, mods, module_spec, _settings(block_px=64), workers=3)
        dsk_threads = zonal_stats(o, mods, module_spec, _settings(block_px=64), scheduler="threads")
    for other in (small, small_pf, dsk, pool, dsk_threads):
        pd.testing.assert_frame_equal(big.table, other.table)
        for name in ("cell_median", "cell_p95", "cell_count", "sub_median", "sub_p95"):
            np.testing.assert_array_equal(getattr(big, name), getattr(other, name))


def test_progress_reports_every_block(scene, module_spec):
    path, _, mods = scene
    calls = []
    with open_orthos(path) as o:
        zonal_stats(o, mods, module_spec, _settings(block_px=64), progress=lambda *a: calls.append(a))
    assert calls[0][0] == "zonal" and calls[0][1] == 0
    total = calls[0][2]
    assert total > 1
    assert [c[1] for c in calls] == list(range(total + 1))
    assert all(c[2] == total for c in calls)


def test_shift_moves_the_footprints(write_tif, make_modules, module_spec):
    # Hot square 1 m east of where the layout draws the module: a (1.0, 0.0) m shift finds it.
    data = np.full((100, 140), 20.0, dtype="float32")
    data[20:80, 40:100] = 50.0  # x 2.0..5.0 m, y -1.0..-4.0 m from the origin
    path = write_tif("s.tif", data)
    mods = make_modules(ORIGIN[0] + 1.6, ORIGIN[1] - 3.4, 0.0, 2.0, 1.0)  # x 1.6..3.6
    with open_orthos(path) as o:
        plain = zonal_stats(o, mods, module_spec, _settings())
        moved = zonal_stats(o, mods, module_spec, _settings(), shift=(1.0, 0.0))  # x 2.6..4.6
    assert plain.table["t_min_c"].iloc[0] == pytest.approx(20.0)
    assert moved.table["t_min_c"].iloc[0] == pytest.approx(50.0)
    assert moved.shift == (1.0, 0.0)


def test_module_outside_all_tiles(write_tif, make_modules, module_spec):
    path = write_tif("o.tif", np.full((80, 80), 30.0, "float32"))
    mods = make_modules([ORIGIN[0] + 0.5, ORIGIN[0] + 500.0], [ORIGIN[1] - 3.0, ORIGIN[1] - 3.0])
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec, _settings())
    t = zs.table
    assert t["tile"].tolist() == [0, -1]
    assert t["valid_fraction"].tolist() == [1.0, 0.0]
    assert t["n_pixels"].iloc[1] == 0
    assert t.iloc[1][["t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c", "t_std_k"]].isna().all()
    assert np.isnan(zs.cell_median[1]).all() and (zs.cell_count[1] == 0).all()
    assert np.isnan(zs.sub_p95[1]).all()
    assert t["t_median_c"].iloc[0] == pytest.approx(30.0)


def test_partial_coverage_and_all_nan(write_tif, make_modules, module_spec, centres):
    data = np.full((80, 80), 30.0, "float32")
    data[:, 40:] = np.nan  # right half has no data
    path = write_tif("p.tif", data)
    # module 0 straddles the NaN edge (x = 2.0 m); module 1 entirely in NaN; module 2 hangs
    # over the raster's west edge (x = 0)
    mods = make_modules(
        [ORIGIN[0] + 1.03, ORIGIN[0] + 2.43, ORIGIN[0] - 0.97], [ORIGIN[1] - 1.52, ORIGIN[1] - 3.02, ORIGIN[1] - 1.52]
    )
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec, _settings())
        transform = o.tiles[0].transform
    frames = mods[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy()
    t = zs.table
    ref0 = _reference(data, frames[0], (12, 6, 3), 0.04, 0.06, centres(transform, data.shape))
    assert t["valid_fraction"].iloc[0] == pytest.approx(ref0["n_valid"] / ref0["n_fp"], abs=1e-12)
    assert 0.3 < t["valid_fraction"].iloc[0] < 0.7
    assert t["valid_fraction"].iloc[1] == 0.0 and t["tile"].iloc[1] == 0 and np.isnan(t["t_median_c"].iloc[1])
    # Overhang: footprint x from -0.89 to 0.95 m (relative to the raster's west edge), so
    # pixel centres (k + 0.5) * 0.05 for k = -18..18 (37 columns), 19 of them (k >= 0) on
    # the raster; the pixels beyond the raster count as not valid.
    assert t["valid_fraction"].iloc[2] == pytest.approx(19 / 37, abs=1e-12)


def test_overlapping_tiles_best_tile_wins(write_tif, make_modules, module_spec):
    # tile 0: 4 m x 4 m at 20 degC; tile 1: starts 2 m east, 4 m x 4 m at 40 degC.
    a = write_tif("t0.tif", np.full((80, 80), 20.0, "float32"), origin=ORIGIN)
    b = write_tif("t1.tif", np.full((80, 80), 40.0, "float32"), origin=(ORIGIN[0] + 2.0, ORIGIN[1]))
    mods = make_modules(
        [ORIGIN[0] + 0.3, ORIGIN[0] + 3.0, ORIGIN[0] + 1.5],
        [ORIGIN[1] - 1.2, ORIGIN[1] - 1.2, ORIGIN[1] - 3.5],
        [0.0, 0.0, 90.0],
    )
    with open_orthos([a, b]) as o:
        zs = zonal_stats(o, mods, module_spec, _settings(block_px=64))
    t = zs.table
    # module 0: x 0.3..2.3 m, tile 1 only covers 2.0..2.3 -> tile 0 wins
    assert t["tile"].iloc[0] == 0 and t["t_median_c"].iloc[0] == pytest.approx(20.0)
    # module 1: x 3.0..5.0 m: tile 0 covers up to 4.0, tile 1 all of it -> tile 1
    assert t["tile"].iloc[1] == 1 and t["t_median_c"].iloc[1] == pytest.approx(40.0)
    assert t["valid_fraction"].iloc[1] == pytest.approx(1.0)
    # module 2: rotated 90 deg, x 0.5..1.5 m -> tile 0 only
    assert t["tile"].iloc[2] == 0 and t["valid_fraction"].iloc[2] == pytest.approx(1.0)


@pytest.mark.parametrize("workers", [1, 3])
def test_equal_coverage_tie_keeps_first_tile(write_tif, make_modules, module_spec, workers):
    a = write_tif("t0.tif", np.full((80, 80), 21.0, "float32"))
    b = write_tif("t1.tif", np.full((80, 80), 22.0, "float32"))
    mods = make_modules(ORIGIN[0] + np.array([1.0, 1.3]), ORIGIN[1] - np.array([1.3, 3.6]), [0.0, 90.0])
    with open_orthos([a, b]) as o:
        zs = zonal_stats(o, mods, module_spec, _settings(block_px=64), workers=workers)
    assert zs.table["tile"].tolist() == [0, 0]
    assert zs.table["t_median_c"].tolist() == pytest.approx([21.0, 21.0])


def test_half_cut_grid_and_pipeline_settings(write_tif, make_modules, module_spec_half_cut):
    from pvscan.io.settings import load_pipeline

    data = np.full((100, 100), 33.0, "float32")
    path = write_tif("h.tif", data)
    mods = make_modules(ORIGIN[0] + 1.0, ORIGIN[1] - 3.0, 10.0, 2.278, 1.134)
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec_half_cut, load_pipeline())
    assert zs.cell_median.shape == (1, 24, 6)
    # the 0.04 margin (9.1 cm) eats almost all of the 9.5 cm end cells; the others are measured
    assert (zs.cell_count[0, 1:-1] > 0).all()
    assert zs.cell_count[0, 0].sum() < zs.cell_count[0, 1].sum() / 4
    assert np.allclose(zs.cell_median[0, 1:-1], 33.0)
    assert zs.settings["edge_margin_u"] == load_pipeline()["zonal"]["edge_margin_u"]


def test_zero_margins_count_matches_area(write_tif, make_modules, module_spec):
    # Axis-aligned module 2.0 x 1.0 m at 0.05 m GSD, offset by a third of a pixel so no
    # centre lies on an edge: 40 x 20 = 800 pixel centres (area / GSD^2).
    path = write_tif("a.tif", np.full((100, 100), 25.0, "float32"))
    mods = make_modules(ORIGIN[0] + 1.0 + GSD / 3, ORIGIN[1] - 3.0 + GSD / 3)
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec, _settings(edge_margin_u=0.0, edge_margin_v=0.0))
    assert zs.table["n_pixels"].iloc[0] == 800
    assert zs.cell_count[0].sum() == 800


def test_measure_window_is_a_pure_array_function(rng):
    from affine import Affine

    data = rng.normal(30, 1, (60, 60)).astype("float32")
    tr = Affine(0.05, 0, 0.0, 0, -0.05, 3.0)
    fr = np.array([[0.5, 0.5, 2.0, 0.0, 0.0, 1.0]])
    r = measure_window(data, tr, fr, (12, 6, 3), (0.0, 0.0))
    # centres x in (0.5, 2.5), y in (0.5, 1.5): cols 10..49, rows 30..49 (all strictly inside)
    block = data[30:50, 10:50]
    assert r["n_valid"][0] == block.size
    assert r["mean"][0] == pytest.approx(block.astype(float).mean(), abs=1e-9)
    _check_order_stats(r["median"][0], r["p95"][0], block.ravel())


def test_degenerate_frame_gives_nan(write_tif, module_spec):
    path = write_tif("d.tif", np.full((40, 40), 25.0, "float32"))
    mods = pd.DataFrame(
        [[ORIGIN[0] + 0.5, ORIGIN[1] - 1.5, 0.0, 0.0, 0.0, 1.0], [np.nan] * 6],
        columns=["fx0", "fy0", "fux", "fuy", "fvx", "fvy"],
    )
    with open_orthos(path) as o:
        zs = zonal_stats(o, mods, module_spec, _settings())
    assert zs.table["t_median_c"].isna().all()
    assert (zs.table["valid_fraction"] == 0).all()


def test_missing_frame_columns(write_tif, module_spec):
    path = write_tif("e.tif", np.full((10, 10), 25.0, "float32"))
    with open_orthos(path) as o, pytest.raises(KeyError, match="fvx"):
        zonal_stats(o, pd.DataFrame({"fx0": [0.0], "fy0": [0.0], "fux": [1.0], "fuy": [0.0]}), module_spec, _settings())


def test_read_window_matches_orthoset(scene):
    from pvscan.io.ortho import read_window

    path, data, _ = scene
    with open_orthos(path) as o:
        w = Window(50, 40, 100, 70)
        np.testing.assert_array_equal(o.read(0, w), read_window(o.tiles[0], w))
        np.testing.assert_array_equal(o.read(0, w), data[40:110, 50:150])


def test_measure_window_module_wider_than_window(rng):
    # Every scanline of the window is covered by one module, so labelled runs meet at the
    # row ends; each row must still be mapped with its own row coordinate.
    from affine import Affine

    data = rng.normal(30, 1, (30, 20)).astype("float32")
    tr = Affine(0.05, 0, 0.0, 0, -0.05, 1.5)  # x 0..1 m, y 0..1.5 m
    # rotated 90 deg: u runs north from y = -0.013 m, v runs west from x = 0.98 m, so the
    # module covers x -0.02..0.98 m and y -0.013..1.987 m: all of the window
    fr = np.array([[0.98, -0.013, 0.0, 2.0, -1.0, 0.0]])
    r = measure_window(data, tr, fr, (12, 6, 3), (0.0, 0.0))
    x = 0.025 + 0.05 * np.arange(20)
    y = 1.5 - 0.025 - 0.05 * np.arange(30)
    xx, yy = np.meshgrid(x, y)
    u = (yy - fr[0, 1]) / 2.0
    v = (fr[0, 0] - xx) / 1.0
    inside = (u >= 0) & (u <= 1) & (v >= 0) & (v <= 1)
    assert inside.all()  # labelled runs continue from one row's end to the next row's start
    assert r["n_valid"][0] == inside.sum()
    ci = np.minimum((u[inside] * 12).astype(int), 11)
    cj = np.minimum((v[inside] * 6).astype(int), 5)
    expect = np.zeros((12, 6), int)
    np.add.at(expect, (ci, cj), 1)
    np.testing.assert_array_equal(r["cell_count"][0], expect)
    assert r["mean"][0] == pytest.approx(data[inside].astype(float).mean(), abs=1e-9)


def test_no_modules_gives_empty_result(write_tif, module_spec):
    path = write_tif("n.tif", np.full((20, 20), 25.0, "float32"))
    empty = pd.DataFrame(columns=["fx0", "fy0", "fux", "fuy", "fvx", "fvy"], dtype=float)
    with open_orthos(path) as o:
        zs = zonal_stats(o, empty, module_spec, _settings())
    assert len(zs) == 0 and list(zs.table.columns) == list(TABLE_COLUMNS)
    assert zs.cell_median.shape == (0, 12, 6) and zs.sub_p95.shape == (0, 3)


def test_south_up_raster_gives_the_same_statistics(write_tif, make_modules, module_spec, rng):
    # The same ground stored bottom row first (positive pixel height) must measure alike.
    from affine import Affine

    data = rng.normal(30, 1, (120, 160)).astype("float32")
    north = write_tif("north.tif", data)
    bottom = ORIGIN[1] - 120 * GSD
    south = write_tif("south.tif", data[::-1].copy(), transform=Affine(GSD, 0, ORIGIN[0], 0, GSD, bottom))
    mods = make_modules(ORIGIN[0] + np.array([1.013, 4.507]), ORIGIN[1] - np.array([3.21, 3.47]), [12.0, 77.0])
    with open_orthos(north) as o:
        a = zonal_stats(o, mods, module_spec, _settings(block_px=64))
    with open_orthos(south) as o:
        b = zonal_stats(o, mods, module_spec, _settings(block_px=64))
    assert (a.table["n_pixels"] > 500).all()
    pd.testing.assert_frame_equal(a.table, b.table, atol=1e-9, rtol=0)
    np.testing.assert_array_equal(a.cell_count, b.cell_count)
    np.testing.assert_array_equal(a.cell_median, b.cell_median)


def test_measure_window_is_the_kernel_zonal_stats_exports():
    from pvscan.measure import zonal, zonal_window

    assert zonal.measure_window is zonal_window.measure_window
    assert "measure_window" in zonal.__all__
