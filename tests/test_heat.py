"""The Faiman heat balance (pvscan.physics.heat), the one copy every stage uses.

Outside reference: pvlib.temperature.faiman, pvlib's implementation of Faiman 2008
(doi:10.1002/pip.813); the normalisation formula of the interface contract.
"""
from __future__ import annotations

import warnings

import numpy as np
import pvlib
import pytest

from pvscan.io.settings import load_pipeline
from pvscan.physics.heat import (
    U0_FAIMAN_2008,
    U1_FAIMAN_2008,
    Faiman,
    faiman_temperature,
    faiman_u,
    normalise_delta_t,
    open_module_rise,
)

ETA = 410.0 / (1000.0 * 1.038 * 2.094)
U0, U1 = 25.0, 6.84   # Faiman 2008's fit, also pvlib's defaults


@pytest.mark.parametrize("poa, ta, ws", [(1000.0, 25.0, 1.0), (650.0, 12.0, 5.0), (870.0, 26.5, 2.1),
                                         (300.0, 35.0, 0.0)])
def test_faiman_matches_pvlib(poa, ta, ws):
    # pvlib: T_module = T_air + poa / (u0 + u1 * ws); rtol 1e-12: the same closed form
    assert faiman_temperature(poa, ta, ws, U0, U1) == pytest.approx(pvlib.temperature.faiman(poa, ta, ws),
                                                                    rel=1e-12)
    assert ta + poa / faiman_u(ws, U0, U1) == pytest.approx(pvlib.temperature.faiman(poa, ta, ws), rel=1e-12)
    u0, u1 = 29.0, 0.0   # another fit, without wind dependence (from memory)
    assert faiman_temperature(poa, ta, ws, u0, u1) == pytest.approx(
        pvlib.temperature.faiman(poa, ta, ws, u0=u0, u1=u1), rel=1e-12)


def test_published_coefficients_are_pvlibs_defaults():
    import inspect

    sig = inspect.signature(pvlib.temperature.faiman)
    assert (U0_FAIMAN_2008, U1_FAIMAN_2008) == (sig.parameters["u0"].default, sig.parameters["u1"].default)


def test_wind_below_zero_is_calm_and_arrays_keep_their_shape():
    ws = np.array([0.0, 1.0, 3.0, -1.0])
    u = faiman_u(ws, U0, U1)
    assert u.shape == (4,)
    assert u[1] == pytest.approx(U0 + U1)
    assert u[3] == pytest.approx(U0)
    assert isinstance(faiman_u(2.0, U0, U1), float)


@pytest.mark.parametrize("poa, ws", [(650.0, 5.0), (900.0, 0.5), (780.0, 2.5)])
def test_open_module_rise_is_eta_times_the_faiman_rise(poa, ws):
    # a module delivering nothing keeps eta*G as heat: rise = eta * (T_faiman - T_air)
    expected = ETA * (pvlib.temperature.faiman(poa, 20.0, ws) - 20.0)
    assert open_module_rise(ETA, poa, ws, U0, U1) == pytest.approx(expected, rel=1e-12)
    # pvlib's PVsyst model with module_efficiency 0 and eta (u_c = u0, u_v = u1, alpha 1):
    # the difference is the same heat over the same U
    t0 = pvlib.temperature.pvsyst_cell(poa, 20.0, ws, u_c=U0, u_v=U1, module_efficiency=0.0, alpha_absorption=1.0)
    t1 = pvlib.temperature.pvsyst_cell(poa, 20.0, ws, u_c=U0, u_v=U1, module_efficiency=ETA, alpha_absorption=1.0)
    assert open_module_rise(ETA, poa, ws, U0, U1) == pytest.approx(t0 - t1, rel=1e-12)


@pytest.mark.parametrize("poa, ws", [(650.0, 5.0), (900.0, 0.5), (780.0, 2.5), (1000.0, 1.0)])
def test_normalised_open_rise_is_the_rise_at_reference_conditions(poa, ws):
    # normalising the open-module rise measured at (G, v) gives the rise at (1000 W/m2,
    # 1 m/s) by pvlib's Faiman model, whatever the flight's conditions
    measured = ETA * (pvlib.temperature.faiman(poa, 20.0, ws) - 20.0)
    at_ref = ETA * (pvlib.temperature.faiman(1000.0, 20.0, 1.0) - 20.0)
    assert normalise_delta_t(measured, poa, ws, g_ref=1000.0, wind_ref=1.0, u0=U0, u1=U1) == \
        pytest.approx(at_ref, rel=1e-12)


def test_normalise_formula_and_degenerate_input():
    # the contract: dT * (1000 / G) * U(v) / U(1 m/s)
    dt = np.array([2.0, 2.0, 2.0, 2.0])
    g = np.array([500.0, 0.0, np.nan, -5.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = normalise_delta_t(dt, g, 3.0, g_ref=1000.0, wind_ref=1.0, u0=20.0, u1=5.0)
        rise = open_module_rise(ETA, 0.0, 1.0, U0, U1)
    assert out[0] == pytest.approx(2.0 * 1000 / 500 * (20 + 15) / (20 + 5))
    assert np.isnan(out[1:]).all()
    assert np.isnan(rise)


def test_coefficients_come_from_the_pipeline():
    p = load_pipeline()
    assert Faiman.from_settings(p) == Faiman(float(p["heat"]["u0"]), float(p["heat"]["u1"]))
    tuned = Faiman.from_settings(p.replace(heat={"u0": 29.0, "u1": 0.0}))
    assert tuned.temperature(800.0, 20.0, 3.0) == pytest.approx(
        pvlib.temperature.faiman(800.0, 20.0, 3.0, u0=29.0, u1=0.0), rel=1e-12)
