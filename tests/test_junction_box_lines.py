"""Junction-box spots against image artefacts along a line of cells.

A junction box heats a spot where the box sits (the centre of a short edge for full-cell
modules; the middle line for half-cut modules with split boxes), raising the p95 of the cells
that meet there while the rest of their cell line stays as it was (common practice: a box's
heat is local, a few centimetres). A mosaic seam that shifts a module by a few centimetres puts
the gap and the ground beside it into the outermost line of cells, warm and cold pixels side by
side, several kelvin either way; a shadow's edge raises a whole column of cells. Neither is a
box. Plants built cell by cell with pvlib's Faiman temperatures (tests/test_classify.py's Plant).
"""
from __future__ import annotations

import numpy as np
from test_classify import Plant, found


def test_edge_line_filled_in_part_by_the_ground_is_no_junction_box(seed):
    # the outermost line at the box's short edge: the box's two cells +8 K in their p95, the
    # others +8, -1, -8, +6 K (ground and frame seen where a seam shifted the module; the
    # values of such a module on a simulated flight, fixed 940000); over 20 plants, no
    # junction box on that module. Before the line's rest was taken per row and either way,
    # 20 of 20 were called junction boxes (the line inside diluted it)
    calls = 0
    for k in range(20):
        p = Plant(np.random.default_rng(seed + 1000 * k))
        i = p.index(col=4)
        A = p.spec.n_along
        p.extra95[i, A - 1, :] += np.array([8.0, -1.3, 7.9, 6.7, -8.3, 5.8])
        an, _ = p.run()
        calls += found(an).get(i) == "junction_box"
    assert calls == 0


def test_warm_column_through_a_split_box_is_no_junction_box(seed):
    # half-cut, split boxes: one cell column of a substring raised 1.8 K in its p95 from end to
    # end (a shadow's edge along it), the box cells included; over 20 plants no junction box.
    # A box at the same place is found (the line around it quiet)
    calls, boxes = 0, 0
    for k in range(20):
        p = Plant(np.random.default_rng(seed + 1000 * k), half_cut=True, split=True)
        i, j = p.index(col=3), p.index(col=8)
        C = p.spec.n_across
        jc = (2 * C) // 3 + C // 6 - 1
        p.extra95[i, :, jc] += 1.8
        p.junction_box(j, 8.0, k=2)
        an, _ = p.run()
        f = found(an)
        calls += f.get(i) == "junction_box"
        boxes += f.get(j) == "junction_box"
    assert calls <= 1
    assert boxes >= 19
