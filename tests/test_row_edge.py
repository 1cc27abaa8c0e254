"""Validity check ``row_edge``: a table row whose footprints sit across its modules.

Small synthetic plants at cell level (``Plant`` of tests/test_classify.py: glass temperatures
from pvlib's Faiman model, half-cut modules in landscape, the long side along the table), read
through :func:`pvscan.diagnose.classify.classify` and
:func:`pvscan.measure.validity.evidence_checks`; the seed comes from PVSCAN_TEST_SEED.

Sources of the numbers used here:
* a footprint off across its module by 5 cm: relief displacement of a raised table in an ortho
  made on the ground's surface model, 2-6 cm at a table's upper row for a drone at 30 m
  (from memory: displacement = offset from nadir x height / flying height, 0.5 m x 10 m / 30 m);
* the ground seen through the gap 10 K cooler than the glass (common practice: shaded or
  night-cooled ground under an array reads several to tens of kelvin below sunlit glass);
* a cell's median over pixels partly on the ground: the pixels' mix, linear in the share on
  the ground (the camera's blur spreads the step over the cell; common practice).
"""
from __future__ import annotations

import numpy as np
from test_classify import Plant, faiman_rise, open_rise

from pvscan.io.settings import load_pipeline
from pvscan.measure.validity import evidence_checks

SHIFT_M = 0.05
GROUND_BELOW_GLASS_K = 10.0


def _row_edge(diagnosis, settings=None):
    checks = {c["name"]: c for c in evidence_checks(diagnosis.evidence, settings or load_pipeline())}
    return checks["row_edge"]


def _plant(rng):
    # 2 x 2 tables of 2 rows: four rows at each position in their tables
    return Plant(rng, orientation="landscape", half_cut=True, strings="half")


def _shift_row_across(p, table, row, shift_m=SHIFT_M):
    """The row's footprints moved ``shift_m`` across the modules: the outer line of cells on
    the ``v = 1`` side takes in that much of the gap and the cooler ground beside the row."""
    m = p.modules
    C = p.spec.n_across
    share = shift_m / (p.spec.width_m / C)          # share of the edge cells on the ground
    idx = np.flatnonzero(((m.table_id == table) & (m.table_row == row)).to_numpy())
    for i in idx:
        p.cm[i][:, C - 1] -= share * GROUND_BELOW_GLASS_K
    return idx


def test_row_off_across_its_modules_is_flagged(rng):
    assert faiman_rise() > GROUND_BELOW_GLASS_K       # the glass is that much above the air, and more
    p = _plant(rng)
    idx = _shift_row_across(p, "T1-0", 2)
    c = _row_edge(p.run())
    share = SHIFT_M / (p.spec.width_m / p.spec.n_across)
    # the row's v = 1 edge line reads share x 10 K (2.9 K) below the rows like it, give or take
    # the cell noise of a median over 12 modules
    assert c["passed"] is False, c
    assert abs(c["value"] - share * GROUND_BELOW_GLASS_K) < 0.5, c
    assert sorted(c["modules"]) == sorted(p.modules.module_id[idx]), c
    # the limit is read from the settings
    s = load_pipeline().to_dict()
    s["validity"] = {**s["validity"], "max_row_edge_offset_k": 100.0}
    assert _row_edge(p.run(), s)["passed"] is True


def test_rows_in_place_pass_with_single_module_faults(rng):
    # a plant in place passes; so does one with faults of single modules along one row (a
    # bypassed substring on the v = 1 strip of two modules, 10-30 K hot cells, common practice):
    # the row's median ignores them
    p = _plant(rng)
    assert _row_edge(p.run())["passed"] is True
    q = _plant(rng)
    q.bypass(q.index("T0-1", 1, 3), [2])
    q.bypass(q.index("T0-1", 1, 8), [2])
    q.hot(q.index("T0-1", 1, 5), [(0, 5)], 20.0)
    c = _row_edge(q.run())
    assert c["passed"] is True, c
    assert c["value"] < 0.5 * open_rise(), c
