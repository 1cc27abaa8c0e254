"""The frame-line comb of a table and the lines between its module rows, on drawn lattices.

The reference is the lattice drawn in each test from datasheet numbers (module 1.038 m wide,
2.094 m long, 0.02 m gaps, common practice for 60-cell modules) and plain geometry: the
modules counted along the axis, the table's centre, the contrast drawn between the frames
and the glass. Pixel centres are drawn at random places (a rotated table seen by the camera's
grid), with the NETD of a microbolometer (0.05 K, common practice).
"""
from __future__ import annotations

import math

import numpy as np
from conftest import test_seed

from pvscan.measure.layout_image.lattice import _row_lines
from pvscan.measure.layout_image.periodic import comb_extent

SEED = test_seed()
WIDTH, LENGTH, GAP = 1.038, 2.094, 0.02
FRAME = 0.035  # frame width seen from above [m] (common practice: 30-40 mm frames)


def _table(rng, s, w, cols, rows, mod_w, glass, ground, dip):
    """Temperature of a drawn table at (s, w) from its corner (0, 0): glass, cooler frames and
    gaps (``dip`` below the glass), ground outside."""
    pitch_s, pitch_w = WIDTH + GAP, mod_w + GAP
    length, depth = cols * pitch_s - GAP, rows * pitch_w - GAP
    on = (s >= 0) & (s <= length) & (w >= 0) & (w <= depth)
    fs = np.mod(s, pitch_s)
    fw = np.mod(w, pitch_w)
    edge = (fs < FRAME) | (fs > WIDTH - FRAME) | (fw < FRAME) | (fw > mod_w - FRAME)
    t = np.where(on, np.where(edge, glass - dip, glass), ground)
    return t + rng.normal(0.0, 0.05, t.size)


def _drawn_size(rng: np.random.Generator, cols_range: tuple[int, int],
                rows_range: tuple[int, int]) -> tuple[int, int, float, float, float]:
    """A random table: columns, rows, the module's foreshortened width [m] (tilt 10-35 deg),
    the table's length and depth [m] (gaps between modules, none outside)."""
    cols, rows = int(rng.integers(*cols_range)), int(rng.integers(*rows_range))
    mod_w = LENGTH * math.cos(math.radians(rng.uniform(10, 35)))
    return cols, rows, mod_w, cols * (WIDTH + GAP) - GAP, rows * (mod_w + GAP) - GAP


def test_comb_counts_the_modules_of_a_table_a_seam_shows_shifted():
    rng = np.random.default_rng(SEED)
    gsd = 0.04
    for _ in range(6):
        cols, rows, mod_w, length, depth = _drawn_size(rng, (8, 16), (1, 4))
        glass = rng.uniform(30, 45)
        ground = glass + rng.choice([-1, 1]) * rng.uniform(0.5, 15)
        dip = rng.uniform(1.5, 4.0)
        n = int(length * depth / gsd ** 2 * 3)
        s = rng.uniform(-1.5, length + 1.5, n)
        w = rng.uniform(-1.5, depth + 1.5, n)
        # a seam across the table: beyond it the scene is shown shifted along the axis (by up to
        # a frame, a gap and a frame: a line can vanish at the seam)
        split = rng.uniform(0.3, 0.7) * length
        shift = rng.choice([-1, 1]) * rng.uniform(0.04, 0.10)
        t = _table(rng, np.where(s > split, s - shift, s), w, cols, rows, mod_w, glass, ground, dip)
        # search frame centred near the table (the candidate's centre is off by up to 0.2 m)
        c_s = 0.5 * length + rng.uniform(-0.2, 0.2)
        c_w = 0.5 * depth + rng.uniform(-0.1, 0.1)
        r = comb_extent(s - c_s, w - c_w, t, (-0.5 * length - 1.0, 0.5 * length + 1.0),
                        (-0.5 * depth - 1.0, 0.5 * depth + 1.0), (-0.15 * depth, 0.15 * depth), WIDTH + GAP,
                        gsd, 0.4, 0.4, 0.15, (mod_w + GAP, GAP), 3.0, ground)
        assert r is not None
        s_lo, s_hi, w_lo, w_hi, line_k, row_k = r
        # the end lines lie half a gap outside the table: their span is cols pitches
        assert round((s_hi - s_lo) / (WIDTH + GAP)) == cols
        # the centre: the lines of one side of the seam set the phase (off by at most the shift)
        assert abs(0.5 * (s_lo + s_hi) + c_s - 0.5 * length) <= abs(shift) + gsd / 2
        assert round((w_hi - w_lo + GAP) / (mod_w + GAP)) == rows
        assert line_k > 0.5 * dip and row_k > 0.5 * dip


def test_comb_ends_at_the_table_and_not_at_the_next_table_about_one_pitch_beyond():
    # tables of one row stand about 1 m apart (common practice), close to one module pitch:
    # the ground just before the next table, with that table's glass half a pitch beyond it,
    # looks like one more frame line of this table's comb
    rng = np.random.default_rng(SEED + 2)
    gsd = 0.04
    for _ in range(6):
        cols, rows, mod_w, length, depth = _drawn_size(rng, (8, 16), (1, 4))
        glass = rng.uniform(30, 45)
        # ground warmer or cooler than the glass by more than the glass band of 3 K
        # ([layout_detect] level_tol_k: sunlit or shaded ground differs by more)
        ground = glass + rng.choice([-1, 1]) * rng.uniform(4.0, 15)
        dip = rng.uniform(1.5, 4.0)
        between = rng.uniform(0.9, 1.1, 2)  # gaps to the tables before and after [m]
        reach = rng.uniform(1.0, 1.4)  # the search runs this far beyond the table's ends [m]
        n = int((length + 2 * reach) * depth / gsd ** 2 * 3)
        s = rng.uniform(-reach - 0.5, length + reach + 0.5, n)
        w = rng.uniform(-1.5, depth + 1.5, n)
        t = _table(rng, s, w, cols, rows, mod_w, glass, ground, dip)
        before = s < -between[0] + 1e-9
        after = s > length + between[1]
        t[before] = _table(rng, s[before] + between[0] + length, w[before], cols, rows, mod_w, glass, ground,
                           dip)
        t[after] = _table(rng, s[after] - between[1] - length, w[after], cols, rows, mod_w, glass, ground, dip)
        c_s = 0.5 * length + rng.uniform(-0.2, 0.2)
        c_w = 0.5 * depth + rng.uniform(-0.1, 0.1)
        r = comb_extent(s - c_s, w - c_w, t, (-0.5 * length - reach, 0.5 * length + reach),
                        (-0.5 * depth - 1.0, 0.5 * depth + 1.0), (-0.15 * depth, 0.15 * depth), WIDTH + GAP,
                        gsd, 0.4, 0.4, 0.15, (mod_w + GAP, GAP), 3.0, ground)
        assert r is not None
        s_lo, s_hi = r[0] + c_s, r[1] + c_s
        assert round((s_hi - s_lo) / (WIDTH + GAP)) == cols, (s_lo, s_hi, length, between, reach)
        # the ends lie on the table's ends (half a gap outside; within a pixel)
        assert abs(s_lo + 0.5 * GAP) <= gsd and abs(s_hi - length - 0.5 * GAP) <= gsd, (s_lo, s_hi, length)


def test_lines_between_module_rows_show_the_drawn_frame_contrast_and_not_on_a_shadow():
    rng = np.random.default_rng(SEED + 1)
    gsd = 0.04
    for _ in range(6):
        cols, rows, mod_w, length, depth = _drawn_size(rng, (6, 14), (2, 5))
        glass, dip = rng.uniform(30, 45), rng.uniform(1.5, 4.0)
        n = int(length * depth / gsd ** 2 * 2)
        s = rng.uniform(0, length, n)
        w = rng.uniform(0, depth, n)
        t = _table(rng, s, w, cols, rows, mod_w, glass, glass + 10.0, dip)
        got = _row_lines(s, w, t, cols, rows, WIDTH, mod_w, GAP, GAP, gsd, 0.15)
        # the glass beside a row line against its coolest bin: the drawn dip, the glass's mean
        # along the row holding the cool frames and gaps between the modules (2 frames and a
        # gap per pitch); within a few NETD (the minimum over a few bins)
        expected = dip * (1.0 - (2 * FRAME + GAP) / (WIDTH + GAP))
        assert abs(got - expected) < 0.15
        # the same lattice laid on a smooth shadow with a soft edge across it: no row lines
        shadow = glass - 8.0 + 3.0 * np.tanh((w - rng.uniform(0, depth)) / 0.3) + rng.normal(0, 0.05, n)
        assert _row_lines(s, w, shadow, cols, rows, WIDTH, mod_w, GAP, GAP, gsd, 0.15) < 1.0
        assert math.isnan(_row_lines(s, w, t, cols, 1, WIDTH, mod_w, GAP, GAP, gsd, 0.15))



def test_lines_between_module_rows_along_the_pixel_grid_take_no_side_from_one_bin():
    # a table along the pixel grid leaves every other half-pixel bin of the profile across it
    # empty: a line with glass-level shadow on one side and sunlit ground 10-20 K warmer on the
    # other (a lattice laid a row too far, over a tracker row's shadow) is no line whatever
    # the bins' phase against the pixel grid (plain geometry: the cooler side is the shadow,
    # at the line's own temperature; within a few NETD). Every phase of the grid is drawn, so
    # a side taken from one bin reads the ground's 10-20 K on about half of them.
    rng = np.random.default_rng(SEED + 5)
    gsd = 0.05
    cols, mod_w = 8, LENGTH * math.cos(math.radians(rng.uniform(10, 35)))
    pitch_w = mod_w + GAP
    line_w = pitch_w - 0.5 * GAP  # the line between the lattice's two rows
    for k in range(8):
        off = (k + rng.uniform()) / 8 * gsd  # the pixel grid's phase against the lattice
        s_c = (np.arange(int(cols * (WIDTH + GAP) / gsd)) + 0.5) * gsd
        w_c = (np.arange(int(2 * pitch_w / gsd) + 2) + 0.5) * gsd - off
        s, w = (a.ravel() for a in np.meshgrid(s_c, w_c))
        shadow = rng.uniform(30, 45)
        ground = shadow + rng.uniform(10, 20)
        t = np.where(w < line_w + 0.5 * gsd, shadow, ground) + rng.normal(0.0, 0.05, s.size)
        got = _row_lines(s, w, t, cols, 2, WIDTH, mod_w, GAP, GAP, gsd, 0.15)
        assert got < 0.5, (k, off, got)


def _write_ortho(path, rng, cols, rows, mod_w, glass, ground, dip, gsd, origin, margin_m, beside=None):
    """A north-up GeoTIFF of one drawn table running east (pixel centres on a grid, NETD noise);
    ``beside(s, w, t)`` may change the scene (``s`` east from the table's west end, ``w`` south
    from its north edge [m])."""
    import rasterio
    from rasterio.transform import from_origin

    length, depth = cols * (WIDTH + GAP) - GAP, rows * (mod_w + GAP) - GAP
    nx = int(math.ceil((length + 2 * margin_m) / gsd))
    ny = int(math.ceil((depth + 2 * margin_m) / gsd))
    x0, y_top = origin[0] - margin_m, origin[1] + depth + margin_m
    cx = x0 + (np.arange(nx) + 0.5) * gsd
    cy = y_top - (np.arange(ny) + 0.5) * gsd
    xx, yy = np.meshgrid(cx, cy)
    # s east from the table's west end, w south from its north (upper) edge
    t = _table(rng, (xx - origin[0]).ravel(), (origin[1] + depth - yy).ravel(), cols, rows, mod_w, glass,
               ground, dip)
    if beside is not None:
        t = beside((xx - origin[0]).ravel(), (origin[1] + depth - yy).ravel(), t)
    t = t.reshape(ny, nx)
    with rasterio.open(path, "w", driver="GTiff", width=nx, height=ny, count=1, dtype="float32",
                       crs="EPSG:32633", transform=from_origin(x0, y_top, gsd, gsd), nodata=-9999.0) as ds:
        ds.write(t.astype(np.float32), 1)
    return length, depth


def _neighbours(rng, between, full, drawn):
    """The scene changed to hold the tables before and after the drawn one, ``between`` [m]
    away; ``drawn`` = (cols, rows, mod_w, glass, ground, dip) of the drawn table."""

    def beside(s, w, t):
        before, after = s < -between[0], s > full + between[1]
        t = t.copy()
        t[before] = _table(rng, s[before] + between[0] + full, w[before], *drawn)
        t[after] = _table(rng, s[after] - between[1] - full, w[after], *drawn)
        return t

    return beside


def _shadow_beside(rng, shadow_w, shadow, length):
    """The scene changed to hold a shadow ``shadow_w`` [m] wide north of the drawn row, at
    ``shadow`` [degC]."""

    def beside(s, w, t):
        in_shadow = (w < 0) & (w > -shadow_w) & (s > 0) & (s < length)
        return np.where(in_shadow, shadow + rng.normal(0.0, 0.05, s.size), t)

    return beside


def test_a_table_longer_than_its_candidate_is_fitted_to_its_ends(tmp_path):
    # the mosaic can see only part of a table (a seam or a shadow breaks it up): the fit must
    # run on to the table's drawn ends, counting its modules (plain geometry of the drawing),
    # and stop there, before the next tables of its row
    from pvscan.io.manifest import LayoutSpec, ModuleSpec
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline, section
    from pvscan.measure.layout_image.lattice import fit_table
    from pvscan.measure.layout_image.segment import TableCandidate

    rng = np.random.default_rng(SEED + 3)
    cfg = dict(section(load_pipeline(), "layout_detect"))
    gsd = 0.05
    for k in range(3):
        cols, rows = int(rng.integers(16, 26)), int(rng.integers(1, 3))
        tilt = rng.uniform(10, 35)
        mod_w = LENGTH * math.cos(math.radians(tilt))
        glass = rng.uniform(30, 45)
        # ground off the glass level by more than the glass band ([layout_detect] level_tol_k)
        ground = glass + rng.choice([-1, 1]) * rng.uniform(5, 15)
        origin = np.array([500000.0, 5000000.0])
        path = tmp_path / f"t{k}.tif"
        dip = rng.uniform(1.5, 4.0)
        # the tables before and after it in the row, about a metre away (common practice)
        full = cols * (WIDTH + GAP) - GAP
        beside = _neighbours(rng, rng.uniform(0.9, 1.1, 2), full, (cols, rows, mod_w, glass, ground, dip))
        length, depth = _write_ortho(path, rng, cols, rows, mod_w, glass, ground, dip, gsd, origin, full + 3.0,
                                     beside)
        # a candidate over 30-50 % of the table, somewhere along it
        part = rng.uniform(0.3, 0.5) * length
        start = rng.uniform(0.05, 0.95 - part / length) * length
        cand = TableCandidate(centre=origin + np.array([start + 0.5 * part, 0.5 * depth]),
                              axis=np.array([1.0, 0.0]), length_m=part, depth_m=depth, level_c=glass,
                              band_c=(glass - 1.0, glass + 1.0), energy_log_thr=0.0, ground_c=ground, area_px=1)
        module = ModuleSpec(pmax_w=400.0, width_m=WIDTH, length_m=LENGTH, cells_across=6, cells_along=10,
                            bypass_diodes=3)
        layout = LayoutSpec(orientation="portrait", gap_m=GAP, tilt_deg=float(tilt), azimuth_deg=180.0)
        with open_orthos(path) as orthos:
            fit = fit_table(orthos, cand, module, layout, cfg)
        assert fit is not None
        assert (fit.cols, fit.rows) == (cols, rows), (fit.cols, fit.rows, cols, rows, start, part)
        # the ends where they are drawn, within a pixel
        assert abs(fit.origin[0] - origin[0]) <= gsd, (fit.origin, origin)
        assert abs(fit.origin[0] + fit.length_m - origin[0] - length) <= gsd


def test_a_tracker_row_merged_with_its_shadow_is_fitted_on_the_row(tmp_path):
    # a tracker row (one module row, portrait, steep tilt) and its shadow beside it at about the
    # glass level form one candidate; the fit must count the row's drawn modules, one row, the
    # row where it is drawn
    from pvscan.io.manifest import LayoutSpec, ModuleSpec
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline, section
    from pvscan.measure.layout_image.lattice import fit_table
    from pvscan.measure.layout_image.segment import TableCandidate

    rng = np.random.default_rng(SEED + 4)
    cfg = dict(section(load_pipeline(), "layout_detect"))
    gsd = 0.05
    module = ModuleSpec(pmax_w=400.0, width_m=WIDTH, length_m=LENGTH, cells_across=6, cells_along=10,
                        bypass_diodes=3)
    for k in range(3):
        cols = int(rng.integers(10, 16))
        tilt = rng.uniform(45, 55)
        mod_w = LENGTH * math.cos(math.radians(tilt))
        glass = rng.uniform(10, 20)
        ground = glass + rng.uniform(15, 25)  # sunlit ground far warmer than the glass
        shadow_w = rng.uniform(2.0, 3.0)  # the shadow's width beside the row [m]
        shadow = glass + rng.uniform(-1.0, 1.0)  # shaded ground within the glass band of 3 K
        beside = _shadow_beside(rng, shadow_w, shadow, cols * (WIDTH + GAP))

        origin = np.array([500000.0, 5000000.0])
        path = tmp_path / f"r{k}.tif"
        length, depth = _write_ortho(path, rng, cols, 1, mod_w, glass, ground, rng.uniform(1.5, 3.0), gsd, origin,
                                     4.0, beside)
        # the candidate: the row and its shadow (north of the row, w < 0)
        cand = TableCandidate(centre=origin + np.array([0.5 * length, depth - 0.5 * (depth + shadow_w)]) +
                              np.array([0.0, shadow_w]), axis=np.array([1.0, 0.0]), length_m=length,
                              depth_m=depth + shadow_w, level_c=glass, band_c=(glass - 1.0, glass + 1.0),
                              energy_log_thr=0.0, ground_c=ground, area_px=1)
        layout = LayoutSpec(orientation="portrait", gap_m=GAP, tilt_deg=float(tilt), azimuth_deg=180.0)
        with open_orthos(path) as orthos:
            fit = fit_table(orthos, cand, module, layout, cfg)
        assert fit is not None and fit.confidence >= float(cfg["min_confidence"])
        assert (fit.cols, fit.rows, fit.orientation) == (cols, 1, "portrait"), (fit.cols, fit.rows, fit.orientation)
        # the row where it is drawn: its north edge at the origin's northing + depth, within two
        # pixels (against a shadow at the glass level that edge is seen by the comb alone)
        north = max(fit.origin[1], fit.origin[1] + fit.depth_m * fit.across[1])
        assert abs(north - (origin[1] + depth)) <= 2 * gsd, (north, origin[1] + depth)
        assert abs(fit.origin[0] - origin[0]) <= gsd


def test_the_ground_between_two_tables_is_no_module_of_a_longer_comb():
    # two tables of a row about 1 m apart (common practice) with the ground between them off the
    # glass level: framed by the two end frames, the ground looks like one module of a comb of
    # the other orientation's longer pitch (landscape over portrait tables; plain geometry: one
    # pitch of 2.11 m spans an end module, the gap and the next end module), and its "glass"
    # against those frames shows the ground's contrast, many kelvin. A window over one table
    # that takes in the gap and the next table's end (a candidate grown along its row): no
    # module of the comb that comes back has its middle on that ground.
    rng = np.random.default_rng(SEED + 6)
    gsd = 0.05
    long_pitch = LENGTH + GAP
    for k in range(16):
        cols, rows, mod_w, length, depth = _drawn_size(rng, (10, 16), (1, 3))
        glass = rng.uniform(30, 45)
        # ground off the glass by more than the glass band ([layout_detect] level_tol_k = 3 K)
        ground = glass + rng.choice([-1, 1]) * rng.uniform(5.0, 15.0)
        dip = rng.uniform(1.5, 4.0)
        between = rng.uniform(0.9, 1.1)
        before = rng.uniform(1.5, 2.5)            # the window this far before the gap's middle [m]
        after = rng.uniform(0.6, 0.9) * length     # and this far after it
        n = int((before + after + 1.0) * (depth + 3.0) / gsd ** 2 * 3)
        s = rng.uniform(-before - 0.5, after + 0.5, n)  # from the gap's middle
        w = rng.uniform(-1.5, depth + 1.5, n)
        left = s < -0.5 * between
        t = np.empty(n)
        t[left] = _table(rng, s[left] + 0.5 * between + length, w[left], cols, rows, mod_w, glass, ground, dip)
        t[~left] = _table(rng, s[~left] - 0.5 * between, w[~left], cols, rows, mod_w, glass, ground, dip)
        c_w = 0.5 * depth + rng.uniform(-0.1, 0.1)
        r = comb_extent(s, w - c_w, t, (-before, after), (-0.5 * depth - 1.0, 0.5 * depth + 1.0),
                        (-0.15 * depth, 0.15 * depth), long_pitch, gsd, 0.4, 0.4, 0.15, (mod_w + GAP, GAP), 3.0,
                        ground)
        if r is None:
            continue
        s_lo, s_hi = r[0], r[1]
        # the modules of the run: none has its middle on the middle half of the ground between
        # the tables (the middle half of such a module lies about three quarters on the ground;
        # one whose middle is nearer a table's end is about half on each, which the comb may
        # take either way)
        mids = s_lo + long_pitch * (np.arange(int(round((s_hi - s_lo) / long_pitch))) + 0.5)
        assert not (np.abs(mids) < 0.25 * between).any(), (k, s_lo, s_hi, between)
