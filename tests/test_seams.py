"""Levelling of image artefacts (mosaic seams, reflections) along table rows.

The checks are physics of the layout: a mosaic seam adds a constant to everything on one side
of it whatever the strings (the additive offset of a frame, common practice), while an open
string's raise stays within one string (IEC TS 62446-3 describes a string's modules all
warmer; from memory).
"""
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

from pvscan import seams


@dataclass
class _Stats:
    """The statistics fields that level_stats shifts."""

    table: pd.DataFrame
    cell_median: np.ndarray
    cell_p95: np.ndarray
    sub_median: np.ndarray
    sub_p95: np.ndarray


def _rows(rng, n_tables=1, rows=2, cols=24, spread=0.3, per_string=12):
    recs = []
    for t in range(n_tables):
        for r in range(1, rows + 1):
            for c in range(1, cols + 1):
                s = (c - 1) // per_string
                recs.append({"module_id": f"T{t}-R{r}-C{c:02d}", "table_id": f"T{t}", "table_row": r,
                             "table_col": c, "string_id": f"T{t}-R{r}-S{s}", "string_index": (c - 1) % per_string + 1})
    m = pd.DataFrame(recs)
    t = 45.0 + rng.normal(0.0, spread, len(m))
    return m, t


def _sel(m, row, c0, c1, table="T0"):
    return np.flatnonzero(((m.table_id == table) & (m.table_row == row) & m.table_col.between(c0, c1)).to_numpy())


def test_seam_stretch_across_two_strings_is_levelled(rng):
    m, t = _rows(rng)
    idx = _sel(m, 2, 9, 17)                  # modules 9..17 of row 2: strings S0 and S1
    t[idx] += 1.8
    out = seams.find_stretches(m, t)
    assert len(out) == 1
    s = out[0]
    assert s.reason == "strings"
    assert set(s.modules.tolist()) == set(idx.tolist())
    assert s.offset_k == pytest.approx(1.8, abs=0.35)


def test_open_string_is_not_levelled(rng):
    # a whole string raised (an open string) stays within one string and is not repeated in
    # the table's other row: a defect, left for the classifier
    m, t = _rows(rng, cols=36)
    idx = _sel(m, 1, 13, 24)                 # string S1 of row 1, with healthy strings either side
    t[idx] += 2.5
    assert seams.find_stretches(m, t) == []


def test_stretch_repeated_in_the_other_row_is_levelled(rng):
    # a reflection or a seam crossing both rows of a table over the same modules of one string
    m, t = _rows(rng)
    a, b = _sel(m, 1, 3, 8), _sel(m, 2, 3, 8)
    t[a] -= 1.5
    t[b] -= 1.6
    out = seams.find_stretches(m, t)
    assert {s.reason for s in out} == {"rows"}
    assert sorted(np.concatenate([s.modules for s in out]).tolist()) == sorted(np.concatenate([a, b]).tolist())


def test_stretch_running_to_the_row_end_is_left_alone(rng):
    # which side is the artefact is unknown from the row
    m, t = _rows(rng)
    t[_sel(m, 2, 9, 24)] += 1.8
    assert seams.find_stretches(m, t) == []


def test_small_steps_are_not_edges(rng):
    m, t = _rows(rng)
    t[_sel(m, 2, 9, 17)] += 0.5              # below min_step_k: within the spread's reach
    assert seams.find_stretches(m, t) == []


def test_level_stats_shifts_every_temperature_of_the_stretch(rng):
    m, t = _rows(rng)
    idx = _sel(m, 2, 9, 17)
    t[idx] += 1.8
    n, A, C, B = len(m), 4, 3, 3
    cell = np.repeat(t[:, None, None], A * C, axis=1).reshape(n, A, C).astype(np.float32)
    table = pd.DataFrame({"t_mean_c": t, "t_median_c": t, "t_p95_c": t + 0.5, "t_max_c": t + 1, "t_min_c": t - 1,
                          "t_std_k": np.full(n, 0.2), "valid_fraction": np.ones(n)})
    st = _Stats(table, cell, cell + 0.5, cell[:, 0, :].copy(), cell[:, 0, :] + 0.5)
    out = seams.find_stretches(m, t)
    lev, off = seams.level_stats(st, out)
    assert np.count_nonzero(off) == len(idx)
    d = off[idx[0]]
    assert lev.table.t_median_c[idx[0]] == pytest.approx(t[idx[0]] - d)
    assert lev.cell_p95[idx[0]].max() == pytest.approx(t[idx[0]] + 0.5 - d, abs=1e-4)
    assert lev.sub_median[idx[0]][0] == pytest.approx(t[idx[0]] - d, abs=1e-4)
    assert lev.table.t_std_k[idx[0]] == 0.2
    others = np.setdiff1d(np.arange(n), idx)
    assert np.array_equal(lev.table.t_median_c.to_numpy()[others], t[others])


@pytest.mark.parametrize("spread, levelled", [(0.1, True), (0.6, False)])
def test_short_stretch_must_stand_out_of_the_spread(rng, spread, levelled):
    # three modules 1 K up across a string boundary: clear against a 0.1 K module-to-module
    # spread, but a chance excess against 0.6 K (2.4 standard errors of the difference of the
    # means, below seam_z)
    m, t = _rows(rng, spread=spread)
    t[_sel(m, 1, 12, 14)] += 1.0
    assert bool(seams.find_stretches(m, t)) is levelled
