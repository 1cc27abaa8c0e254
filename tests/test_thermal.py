"""Faiman heat-loss coefficient, normalisation, open-module rise and the local reference.

Outside references: pvlib.temperature.faiman (pvlib's implementation of Faiman 2008,
doi:10.1002/pip.813) for the heat balance; the CONTRACT formula for the normalisation.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pvlib
import pytest

from pvscan.io.settings import load_pipeline
from pvscan.diagnose.thermal import (faiman_u, local_reference, module_centres, normalise_delta_t,
                            open_module_rise, reference_neighbours)

ETA = 410.0 / (1000.0 * 1.038 * 2.094)


@pytest.mark.parametrize("poa, ta, ws", [(1000.0, 25.0, 1.0), (650.0, 12.0, 5.0), (870.0, 26.5, 2.1),
                                         (300.0, 35.0, 0.0)])
def test_faiman_u_matches_pvlib(poa, ta, ws):
    # pvlib: T_module = T_air + poa / (u0 + u1 * ws); rtol 1e-12: same closed form
    t_pvlib = pvlib.temperature.faiman(poa, ta, ws)
    assert ta + poa / faiman_u(ws) == pytest.approx(t_pvlib, rel=1e-12)
    u0, u1 = 29.0, 0.0   # pvlib's docstring mentions u0 = 29, u1 = 0 as another fit (from memory)
    assert ta + poa / faiman_u(ws, u0, u1) == pytest.approx(
        pvlib.temperature.faiman(poa, ta, ws, u0=u0, u1=u1), rel=1e-12)


def test_faiman_u_array_and_calm():
    ws = np.array([0.0, 1.0, 3.0, -1.0])
    u = faiman_u(ws)
    assert u.shape == (4,)
    assert u[1] == pytest.approx(25.0 + 6.84)
    assert u[3] == pytest.approx(25.0)   # negative wind read as calm


@pytest.mark.parametrize("poa, ws", [(650.0, 5.0), (900.0, 0.5), (780.0, 2.5)])
def test_open_module_rise_is_eta_times_the_faiman_rise(poa, ws):
    # a module delivering nothing keeps eta*G as heat: rise = eta * (T_faiman - T_air)
    expected = ETA * (pvlib.temperature.faiman(poa, 20.0, ws) - 20.0)
    assert open_module_rise(ETA, poa, ws) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("poa, ws", [(650.0, 5.0), (900.0, 0.5), (780.0, 2.5), (1000.0, 1.0)])
def test_normalised_open_rise_is_the_rise_at_reference_conditions(poa, ws):
    # normalising the open-module rise measured at (G, v) must give the rise at
    # (1000 W/m2, 1 m/s) by pvlib's Faiman model, whatever the flight's conditions
    measured = ETA * (pvlib.temperature.faiman(poa, 20.0, ws) - 20.0)
    at_ref = ETA * (pvlib.temperature.faiman(1000.0, 20.0, 1.0) - 20.0)
    assert normalise_delta_t(measured, poa, ws) == pytest.approx(at_ref, rel=1e-12)


def test_normalise_formula_and_degenerate_input():
    dt = np.array([2.0, 2.0, 2.0, 2.0])
    g = np.array([500.0, 0.0, np.nan, -5.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = normalise_delta_t(dt, g, 3.0, u0=20.0, u1=5.0)
    assert out[0] == pytest.approx(2.0 * 1000 / 500 * (20 + 15) / (20 + 5))
    assert np.isnan(out[1:]).all()
    assert np.isnan(open_module_rise(ETA, 0.0, 1.0))


def _rows(n_tables=3, rows=2, cols=16, pitch=7.0, seed=0):
    rec = []
    for t in range(n_tables):
        for r in range(rows):
            for c in range(cols):
                rec.append(dict(table_id=f"T{t}", table_row=r + 1, table_col=c + 1,
                                fx0=c * 1.058, fy0=t * pitch + r * 2.114, fux=0.0, fuy=2.094,
                                fvx=1.038, fvy=0.0))
    return pd.DataFrame(rec)


def test_module_centres_from_the_frame():
    m = _rows(1, 1, 2)
    xy = module_centres(m)
    assert xy[1] == pytest.approx([1.058 + 0.519, 1.047])


def test_reference_cancels_gradient_and_ignores_defects(rng):
    m = _rows()
    xy = module_centres(m)
    truth = 45.0 + 0.2 * xy[:, 0] - 0.1 * xy[:, 1]          # smooth drift over the plant
    t = truth + rng.normal(0, 0.2, len(m))
    bad = np.zeros(len(m), bool)
    bad[[5, 6, 40, 70]] = True                               # two of them side by side
    t[bad] += 8.0
    ref = local_reference(m, t, settings=load_pipeline())
    ok = ~bad
    # healthy modules: reference within the noise of the truth (median of 6: ~0.1 K)
    assert np.max(np.abs(ref[ok] - truth[ok])) < 0.6
    # defective modules: their reference is their healthy surroundings, not themselves
    assert np.max(np.abs(ref[bad] - truth[bad])) < 0.6
    # neighbours of the defects are not pulled up
    assert abs(ref[4] - truth[4]) < 0.5 and abs(ref[7] - truth[7]) < 0.5


def test_reference_uses_the_same_row_first(rng):
    m = _rows(1, 2, 20)
    t = np.where(m.table_row.to_numpy() == 1, 40.0, 43.0) + rng.normal(0, 0.1, len(m))
    ref = local_reference(m, t, settings=load_pipeline()["reference"])
    # each row is its own reference: a systematic row offset does not show as delta T
    assert np.max(np.abs(t - ref)) < 0.5
    nb = reference_neighbours(m, np.ones(len(m), bool), load_pipeline())
    rows = m.table_row.to_numpy()
    assert (rows[nb[nb >= 0]].reshape(-1) == np.repeat(rows, (nb >= 0).sum(axis=1))).all()


def test_reference_falls_back_to_the_window_and_excludes_groups(rng):
    m = _rows(2, 2, 6)
    t = 40.0 + rng.normal(0, 0.1, len(m))
    row = m.table_row.to_numpy()
    tab = m.table_id.to_numpy()
    raised = (tab == "T0") & (row == 2)
    t[raised] += 4.0                                         # a whole row raised (open string)
    # the raised row references itself: delta T ~ 0
    ref_row = local_reference(m, t)
    assert np.max(np.abs((t - ref_row)[raised])) < 0.5
    # with its group excluded it is judged against the other rows: delta T ~ 4 K
    group = np.where(raised, 1, 0)
    ref_out = local_reference(m, t, exclude_group=group)
    assert np.allclose((t - ref_out)[raised], 4.0, atol=0.5)
    # a row whose modules are all unhealthy falls back to neighbours of other rows
    healthy = ~raised
    ref_fb = local_reference(m, t, healthy)
    assert np.all(np.isfinite(ref_fb))
    assert np.allclose((t - ref_fb)[raised], 4.0, atol=0.5)


def test_reference_scales_to_a_large_plant(rng):
    # 26 x 40 tables of 2 x 12 modules (~25,000 modules): one KD-tree query per pass
    rec = []
    for tt in range(26 * 40):
        x0, y0 = (tt % 40) * 14.0, (tt // 40) * 6.5
        for r in range(2):
            for c in range(12):
                rec.append((f"T{tt}", r + 1, c + 1, x0 + c * 1.058, y0 + r * 2.114))
    m = pd.DataFrame(rec, columns=["table_id", "table_row", "table_col", "fx0", "fy0"])
    m = m.assign(fux=0.0, fuy=2.094, fvx=1.038, fvy=0.0)
    t = 45.0 + rng.normal(0, 0.3, len(m))
    t[::97] += 6.0
    res = local_reference(m, t, return_details=True)
    assert len(m) == 24960
    assert res.suspect[::97].mean() > 0.95
    assert np.nanmedian(np.abs(res.reference_c - 45.0)) < 0.2
