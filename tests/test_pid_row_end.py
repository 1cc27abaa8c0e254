"""PID where the layout gives no strings: a run at a table row's end.

Strings commonly run along the table rows, so a row's end is a string's end (common practice).
PID takes most from the modules at a string's negative end and fades along the string, with a
patchy pattern of warmer cells, mostly next to the frame (IEC TS 62446-3, the thermal pattern of
PID; the fading along the string: common practice).
"""
from __future__ import annotations

import numpy as np
from test_classify import Plant, _with, found, open_rise


def _edge():
    A, C = 12, 6
    ii, jj = np.indices((A, C))
    return (ii == 0) | (ii == A - 1) | (jj == 0) | (jj == C - 1)


def _row(p, table="T1-0", row=2):
    m = p.modules
    idx = np.flatnonzero(((m.table_id == table) & (m.table_row == row)).to_numpy())
    return [int(i) for i in idx[np.argsort(m.table_col.to_numpy()[idx])]]


def _pid_at_row_end(p, idx, f0):
    """PID over ``idx`` from the negative end: patchy cell weights, heavier next to the frame, the
    lost share of output fading from ``f0`` to a third of it (warming the module by that share of
    an open module's rise)."""
    edge = _edge()
    for k, i in enumerate(idx):
        w = p.rng.gamma(2.0, 0.5, edge.shape) + np.where(edge, 1.0, 0.2)
        p.cm[i] += f0 * (1 / 3) ** (k / max(len(idx) - 1, 1)) * open_rise(p.poa, p.wind) * w / w.mean()


def test_faint_pid_at_a_row_end_is_found_without_strings(rng):
    # a faint PID string (8 % of the first module's output) over the first four modules of a row
    # of twelve, no strings in the layout: the row-wide search needs one module to carry the
    # pattern by itself and misses most of them; tried as a string from the row's end it is
    # found. Measured on 16 plants (seeds 0-15): 42 of 64 modules found, 11 without the row-end
    # run (pid_row_end_far_z out of reach), 1 false module either way; on 8 plants for test seeds
    # 0-9: 14-28 of 32 found, 3-18 without, 7-20 more with, at most 3 false.
    off = _with(pid_row_end_far_z=1e3)
    new = old = false_new = 0
    n_plants = 8
    for _ in range(n_plants):
        p = Plant(rng, strings=None)
        idx = _row(p)[:4]
        _pid_at_row_end(p, idx, 0.08)
        got, got0 = found(p.run().anomalies), found(p.run(settings=off).anomalies)
        new += sum(got.get(i) == "pid" for i in idx)
        old += sum(got0.get(i) == "pid" for i in idx)
        false_new += sum(v == "pid" and k not in idx for k, v in got.items())
    assert new >= 12 and new >= old + 4, (new, old)
    assert false_new <= 3, false_new


def test_edge_ring_along_a_whole_row_is_not_taken_at_its_end(rng):
    # an artefact along a whole table row (a mosaic seam shifting the footprints onto the gaps
    # over sunlit ground, which runs tens of kelvin above the glass: common practice): every
    # module's edge cells read warmer than its interior, PID's sign, and the module warmer. From
    # the row's end it looks like a PID string; against the far part of its own row it is not.
    # Without that test (pid_row_end_far_z at -100) it is taken for PID. Measured on 12 plants
    # (seeds 0-11): taken on none, on 12 without the test (and on none by the row-wide search).
    edge = _edge()
    k_new = k_off = 0
    n_plants = 6
    for _ in range(n_plants):
        p = Plant(rng, strings=None)
        row = _row(p)
        for i in row:
            p.cm[i] += np.where(edge, 0.3, 0.165)
        got = found(p.run().anomalies)
        got0 = found(p.run(settings=_with(pid_row_end_far_z=-100.0)).anomalies)
        k_new += any(got.get(i) == "pid" for i in row)
        k_off += any(got0.get(i) == "pid" for i in row)
    assert k_new <= 1 and k_off >= 5, (k_new, k_off)
