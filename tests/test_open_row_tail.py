"""A whole open table row whose end lies under an image artefact is one open string.

Layouts of table polygons without string ids: the table row stands in for the unknown strings.
An open string (blown fuse, open connector) leaves every one of its modules delivering nothing,
so each runs the open-module rise ``eta * (T_faiman - T_air)`` warmer than producing modules
(IEC TS 62446-3, from memory; pvlib.temperature.faiman for the rise). When the last few modules
of an open row lie under a mosaic seam's edge and a cloud shadow's edge, their cells are no longer
uniform (a step across each module) and their raise is lower, so the run of candidates stops a
few modules short of the row's end while the raise carries on to it. That is the same open row,
not a seam carrying on past an open string: a seam does not stop at a row's end.

Plants of four one-row tables of 16 modules one behind the other (tracker-like rows), built cell
by cell with the Faiman heat balance of pvlib (tests/test_classify.py's Plant).
"""
from __future__ import annotations

import numpy as np
from test_classify import Plant, _with, open_rise


def _open_row_with_a_spoilt_tail(seed: int) -> tuple[Plant, list[int]]:
    rng = np.random.default_rng(seed)
    p = Plant(rng, n_tables=1, table_rows=4, rows=1, cols=16, strings=None)
    row = [p.index(table="T1-0", row=1, col=c) for c in range(1, 17)]
    for i in row:
        p.open(i, label="open_string")
    n_tail = int(rng.integers(2, 6))                 # 2..5 modules at the row's end
    A = p.spec.n_along
    r = open_rise()
    for i in row[-n_tail:]:
        # a seam's edge across the module (a step of 0.8-1.2 of the rise between its halves,
        # a cell IQR well above open_uniform_iqr of the rise) and a shadow's edge that takes
        # 5-40 % of the raise away
        step = rng.uniform(0.8, 1.2) * r
        p.cm[i][: A // 2] -= 0.5 * step
        p.cm[i][A // 2:] += 0.5 * step
        p.cm[i] -= rng.uniform(0.05, 0.4) * r
    return p, row


def test_open_row_whose_end_lies_under_a_seam_is_found_whole(seed):
    # a rate over 20 random plants: the open row found as one open_string over all its 16
    # modules in at least 16. Measured 39 of 40 on seeds 1-2 (x 20 plants each); before a run
    # stopping short of its row's end took in the raised rest of the row, 0 of 20 (the run was
    # rejected as carrying on, a whole open row lost). Binomial bound: with a find rate of
    # 0.95 per plant, P(X <= 15 of 20) = 0.26 % (scipy.stats.binom)
    # ([classify] open_string_row_tail_share = 0 turns the rule off: then at most 4 of 20,
    # measured 0 of 20)
    off = _with(open_string_row_tail_share=0.0)
    hits = hits_off = 0
    for k in range(20):
        p, row = _open_row_with_a_spoilt_tail(seed + 1000 * k)
        for settings in (None, off):
            an, _ = p.run(settings=settings)
            got = an[an.defect == "open_string"]
            whole = len(got) == 1 and sorted(int(i) for i in got.iloc[0]["module_indices"]) == sorted(row)
            if settings is None:
                hits += whole
            else:
                hits_off += whole
    assert hits >= 16
    assert hits_off <= 4
