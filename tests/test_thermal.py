"""The thermal stage: normalisation to reference conditions and the local reference.

Outside references: pvlib.temperature.faiman (pvlib's implementation of Faiman 2008,
doi:10.1002/pip.813) for the heat balance; the CONTRACT formula for the normalisation.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pvlib
import pytest

from pvscan.diagnose.thermal import Normalisation, local_reference, module_thermal, reference_neighbours
from pvscan.io.settings import load_pipeline
from pvscan.measure.rows import module_centres

ETA = 410.0 / (1000.0 * 1.038 * 2.094)


@pytest.mark.parametrize("poa, ws", [(650.0, 5.0), (900.0, 0.5), (780.0, 2.5), (1000.0, 1.0)])
def test_normalised_open_rise_is_the_rise_at_reference_conditions(poa, ws):
    # normalising the open-module rise measured at (G, v) must give the rise at the
    # pipeline's reference conditions (1000 W/m2, 1 m/s) by pvlib's Faiman model
    norm = Normalisation.from_settings(load_pipeline())
    assert (norm.g_ref_w_m2, norm.wind_ref_m_s) == (1000.0, 1.0)
    measured = ETA * (pvlib.temperature.faiman(poa, 20.0, ws) - 20.0)
    at_ref = ETA * (pvlib.temperature.faiman(1000.0, 20.0, 1.0) - 20.0)
    assert norm(measured, poa, ws) == pytest.approx(at_ref, rel=1e-12)


def test_module_thermal_follows_the_contract():
    # delta_t_k = t_median_c - reference_c; delta_t_norm_k = delta_t_k * 1000/G * U(v)/U(1)
    p = load_pipeline().replace(heat={"u0": 20.0, "u1": 5.0})
    cond = pd.DataFrame({"poa_global": [500.0, 0.0, 800.0], "wind_speed": [3.0, 1.0, -2.0]})
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        th = module_thermal([42.0, 40.0, 41.0], [40.0, 40.0, 40.0], cond, Normalisation.from_settings(p))
    assert th.delta_t_k.tolist() == [2.0, 0.0, 1.0]
    assert th.delta_t_norm_k[0] == pytest.approx(2.0 * 1000 / 500 * (20 + 15) / (20 + 5))
    assert np.isnan(th.delta_t_norm_k[1])                  # no irradiance, no normalisation
    assert th.delta_t_norm_k[2] == pytest.approx(1.0 * 1000 / 800 * 20 / 25)   # wind below 0: calm
    assert Normalisation.from_settings(p).to_dict() == {"u0": 20.0, "u1": 5.0, "g_ref_w_m2": 1000.0,
                                                        "wind_ref_m_s": 1.0}


def _rows(n_tables=3, rows=2, cols=16, pitch=7.0):
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
    # healthy modules: reference within the noise of the truth. The median of six
    # neighbours with 0.2 K noise scatters by ~0.13 K inside a row, ~0.19 K at row ends
    # (extrapolated along the trend); the RMS over 92 modules is 0.14 K typically, 0.20 K
    # at the 99th percentile of 300 draws: 0.25 K fails only on a systematic error. (No
    # bound on the single worst module holds on every draw: the extrapolation at a row end
    # has a tail.)
    assert np.sqrt(np.mean((ref[ok] - truth[ok]) ** 2)) < 0.25
    # defective modules: their reference is their healthy surroundings, not themselves
    # (8 K above them); 0.7 K is five standard errors of an interior median of six
    assert np.max(np.abs(ref[bad] - truth[bad])) < 0.7
    # neighbours of the defects are not pulled up (one defect among six neighbours would
    # lift a plain mean by 1.3 K)
    assert abs(ref[4] - truth[4]) < 0.7 and abs(ref[7] - truth[7]) < 0.7


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
