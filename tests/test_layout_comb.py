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
