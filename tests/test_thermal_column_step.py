"""The local reference follows a step shared by the rows of a table (a mosaic seam or a
cloud-shadow edge crossing a table), so an open module beyond the step at a table's end keeps its
rise.

Outside references: pvlib.temperature.faiman (pvlib's implementation of Faiman 2008,
doi:10.1002/pip.813) for the open-module rise eta * G / U(v) of the module that delivers no power;
the module (410 W, 1.038 m x 2.094 m) is an invented common-size module.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pvlib
import pytest

from pvscan.diagnose.thermal import local_reference
from pvscan.io.settings import load_pipeline

ETA = 410.0 / (1000.0 * 1.038 * 2.094)
POA, T_AIR, WIND = 620.0, 22.0, 2.3                       # a shadowed module's irradiance [W/m2], [degC], [m/s]
RISE = ETA * (pvlib.temperature.faiman(POA, T_AIR, WIND) - T_AIR)   # ~2.6 K


def _table(rows=4, cols=12):
    rec = []
    for r in range(rows):
        for c in range(cols):
            rec.append(dict(table_id="T1", table_row=r + 1, table_col=c + 1, string_id=f"S{r + 1}",
                            fx0=c * 1.058, fy0=r * 2.114, fux=0.0, fuy=2.094, fvx=1.038, fvy=0.0))
    return pd.DataFrame(rec)


def _flight(rng, step_k, sigma_k=0.15):
    """4 x 12 table, healthy modules at 38 degC + N(0, sigma); every row's last two columns
    shifted by ``step_k`` in the image; an open module at the end of row 3."""
    m = _table()
    col = m.table_col.to_numpy()
    t = 38.0 + rng.normal(0.0, sigma_k, len(m))
    t[col >= 11] += step_k
    open_i = int(np.flatnonzero((m.table_row.to_numpy() == 3) & (col == 12))[0])
    t[open_i] += RISE
    return m, t, open_i


def _settings(on: bool):
    p = load_pipeline()
    return p.replace(reference={**p["reference"], "column_correction": on})


@pytest.mark.parametrize("step_k", [-1.8, -2.5])
def test_open_module_beyond_a_cold_step_at_the_table_end_keeps_its_rise(rng, step_k):
    m, t, i = _flight(rng, step_k)
    ref = local_reference(m, t, settings=_settings(True))
    # its reference comes from the other rows' ends (the step) not from the warmer row: delta T
    # is the Faiman open-module rise within 0.8 K, about 3.5 times the noise of the module
    # (0.15 K), its row median and the step (medians of a few modules) together (600 draws:
    # worst 0.61 K)
    assert t[i] - ref[i] == pytest.approx(RISE, abs=0.8)
    # the healthy modules beyond the step are not cold against their reference
    healthy_end = (m.table_col.to_numpy() >= 11) & (np.arange(len(m)) != i)
    # (600 draws: worst 0.72 K of the 1.8-2.5 K step)
    assert np.all(np.abs((t - ref)[healthy_end]) < 0.9)
    # without the column step the same module would lose most of its rise (the row reference
    # sits the step above it; the trend along the row recovers a part at most; 600 draws: at
    # least 1.1 K lost): what the setting changes
    old = local_reference(m, t, settings=_settings(False))
    assert t[i] - old[i] < RISE - 0.8


def test_a_warm_column_is_not_taken_for_the_image(rng):
    # the warm ends of several strings (PID at the negative ends raises the same columns of
    # every row) are defects, not a step: the reference does not follow them
    m, t, _ = _flight(rng, +1.5)
    ref = local_reference(m, t, settings=_settings(True))
    old = local_reference(m, t, settings=_settings(False))
    assert np.array_equal(ref, old)


def test_no_step_no_change(rng):
    # a table without a step: the reference is the row reference (0.1 K noise cannot fake a
    # 0.8 K step shared by three rows)
    m, t, _ = _flight(rng, 0.0, sigma_k=0.1)
    assert np.array_equal(local_reference(m, t, settings=_settings(True)),
                          local_reference(m, t, settings=_settings(False)))
