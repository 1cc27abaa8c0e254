"""The frame-line comb over a row of tables, each on a phase of its own.

Tables of one row stand about a metre apart (common practice), not a whole number of module
pitches, so the frame lines of the three tables of a drawn row are on three phases; a table
candidate from the search mosaic can hold the whole row. Where the phase of the whole window
(the outer tables') leaves no run of lines at the window's centre, the comb must find the
table at the centre (as a row of three tables of random flight 712 was lost).

The reference is the row drawn in each test from datasheet numbers (module 1.038 m wide,
0.02 m gaps, common practice for 60-cell modules) and plain geometry: the middle table's
modules and ends. Pixel centres are drawn at random places, with the NETD of a
microbolometer (0.05 K, common practice).
"""
from __future__ import annotations

import numpy as np
from conftest import test_seed
from test_layout_comb import GAP, WIDTH, _drawn_size, _table

from pvscan.io.settings import load_pipeline, section
from pvscan.measure.layout_image.periodic import comb_extent

SEED = test_seed()


def test_comb_over_a_row_of_three_tables_finds_the_table_at_the_window_centre():
    rng = np.random.default_rng(SEED + 17)
    cfg = section(load_pipeline(), "layout_detect")
    gsd = 0.04
    pitch = WIDTH + GAP
    for _ in range(4):
        cols, rows, mod_w, length, depth = _drawn_size(rng, (8, 14), (1, 4))
        glass = rng.uniform(30, 45)
        # ground off the glass level by more than its band of 3 K ([layout_detect] level_tol_k)
        ground = glass + rng.choice([-1, 1]) * rng.uniform(4.0, 15)
        dip = rng.uniform(1.5, 4.0)
        # the gaps between the tables (0.3-1.8 m): the outer tables on one phase, the middle one
        # 0.3-0.7 pitch off it (further than a frame line is looked for, [layout_detect]
        # line_shift_m 0.15 m)
        u = rng.uniform(-0.2, 0.2)
        g1, g2 = GAP + pitch * (0.5 + u), GAP + pitch * (1.5 - u)
        starts = np.array([0.0, length + g1, 2 * length + g1 + g2])
        total = starts[-1] + length
        n = int((total + 2.0) * (depth + 2.0) / gsd ** 2 * 2)
        s = rng.uniform(-1.0, total + 1.0, n)
        w = rng.uniform(-1.0, depth + 1.0, n)
        t = _table(rng, s, w, cols, rows, mod_w, glass, ground, dip)  # ground and the first table
        for a in starts[1:]:
            sel = s >= a - 0.5 * g1
            t[sel] = _table(rng, s[sel] - a, w[sel], cols, rows, mod_w, glass, ground, dip)
        # the window over the whole row, centred (within 0.2 m) on the middle table
        c_s = starts[1] + 0.5 * length + rng.uniform(-0.2, 0.2)
        # a cool streak across the middle table (soiling, a cell-gap line; common practice) where
        # the outer tables' lines would run on: at the window's centre the outer tables' phase
        # has one line and none beside it
        streak = round((c_s + 0.5 * GAP) / pitch) * pitch - 0.5 * GAP
        cool = (np.abs(s - streak) < GAP / 2 + 0.03) & (w >= 0) & (w <= depth)
        t[cool] -= dip
        c_w = 0.5 * depth + rng.uniform(-0.1, 0.1)
        half = max(c_s + 1.0, total + 1.0 - c_s)
        r = comb_extent(s - c_s, w - c_w, t, (-half, half), (-0.5 * depth - 1.0, 0.5 * depth + 1.0),
                        (-0.15 * depth, 0.15 * depth), pitch, gsd, float(cfg["dip_fraction"]),
                        float(cfg["close_m"]), float(cfg["line_shift_m"]), (mod_w + GAP, GAP),
                        float(cfg["level_tol_k"]), ground, float(cfg["comb_local_pitches"]))
        assert r is not None
        s_lo, s_hi = r[0] + c_s, r[1] + c_s
        assert round((s_hi - s_lo) / pitch) == cols, (s_lo, s_hi, starts, length)
        # the ends on the middle table's ends (the end lines half a gap outside; within a pixel)
        assert abs(s_lo - (starts[1] - 0.5 * GAP)) <= gsd and abs(s_hi - (starts[1] + length + 0.5 * GAP)) <= gsd, \
            (s_lo, s_hi, starts, length)
        assert round((r[3] - r[2] + GAP) / (mod_w + GAP)) == rows
