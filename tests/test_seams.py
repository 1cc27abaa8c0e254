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
from conftest import test_seed

from pvscan.measure import seams


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
    n, A, C = len(m), 4, 3
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


def test_pipeline_levels_a_seam_painted_into_the_ortho(tmp_path):
    # a simulated flight (no distractors), then a +1.8 K step painted into the ortho over part of
    # one table row, across a string boundary, as a mosaic seam would add it (an additive offset
    # on glass and ground alike): the pipeline finds the stretch, levels it back to the truth and
    # reports it in summary.json
    import json

    import rasterio
    from rasterio.windows import from_bounds

    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    sc = {"site": {"name": "Test field Seam Hollow (invented)", "lon": 9.8, "lat": 47.5},
          "array": {"table_rows": 2, "tables_per_row": 1, "rows": 2, "cols": 16, "rotation_deg": 0.0,
                    "modules_per_string": 8},
          "defects": {k: 0 for k in ("hot_cell", "several_hot_cells", "bypassed_substring",
                                     "several_bypassed_substrings", "open_module", "open_string", "pid",
                                     "soiling", "junction_box")}}
    sim = simulate_flight(sc, tmp_path / "flight", seed=test_seed(11))
    flight = load_flight(sim.manifest)
    tif = flight.flight.orthos[0]
    with rasterio.open(tif) as ds:
        crs = ds.crs
    mods = read_layout(flight, crs)
    table = sorted(mods.table_id.unique())[0]
    sel = mods[(mods.table_id == table) & (mods.table_row == 2) & mods.table_col.between(6, 11)]
    x0, y0, x1, y1 = sel.total_bounds
    with rasterio.open(tif, "r+") as ds:
        win = from_bounds(x0 - 0.02, y0, x1 + 0.02, y1, ds.transform).round_offsets().round_lengths()
        a = ds.read(1, window=win)
        ok = a != ds.nodata
        a[ok] += 1.8
        ds.write(a, 1, window=win)
    inspect_flight(sim.manifest, out_dir=tmp_path / "result", report=False)
    summary = json.loads((tmp_path / "result" / "summary.json").read_text())
    art = summary["image_artefacts"]
    assert art["levelling"] is True
    got = {m for s in art["stretches"] for m in s["modules"]}
    assert set(sel.module_id.iloc[1:-1]) <= got <= set(sel.module_id)
    st = [s for s in art["stretches"] if set(s["modules"]) & set(sel.module_id)][0]
    assert st["reason"] == "strings" and st["offset_k"] == pytest.approx(1.8 * 1.05, abs=0.4)
    # levelled temperatures are back at the truth (true glass temperature, simulator's truth),
    # to within the spread of the modules the offset was measured against (about 0.35 K for
    # two medians of six modules each)
    truth = {f["properties"]["module_id"]: f["properties"]["t_true_median_c"]
             for f in json.loads((tmp_path / "flight" / "truth.geojson").read_text())["features"]}
    res = {f["properties"]["module_id"]: f["properties"]["t_median_c"]
           for f in json.loads((tmp_path / "result" / "modules.geojson").read_text())["features"]}
    err = [res[m] - truth[m] for m in sel.module_id.iloc[1:-1]]
    other = [res[m] - truth[m] for m in truth if m not in set(sel.module_id)]
    assert abs(np.median(err) - np.median(other)) < 0.6
    assert abs(np.median(err) - np.median(other) + st["offset_k"]) > 1.5  # where they were before


def test_modules_without_a_string_do_not_make_a_stretch_cross_strings(rng):
    # a raised run inside one string (a possible open string) stays a defect's business even
    # when the layout leaves a module of it without a string id
    m, t = _rows(rng, cols=36)
    idx = _sel(m, 1, 13, 24)
    t[idx] += 2.5
    m.loc[idx[3], "string_id"] = None
    assert seams.find_stretches(m, t) == []
