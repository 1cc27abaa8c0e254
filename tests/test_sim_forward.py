"""The simulator's forward model against outside references.

Sources named beside each check: scipy.constants (CODATA 2018), scipy.integrate.quad,
Wien's displacement law (b = 2.897771955e-3 m K, CODATA), the Stefan-Boltzmann law
(sigma from CODATA), pvlib (Faiman module temperature, single-diode model).
"""
from __future__ import annotations

import numpy as np
import pytest
from conftest import test_seed
from scipy import constants, integrate, optimize

from pvscan.simulate import electrical, radiance

SEED = test_seed()
BAND = (7.5, 13.5)


def _quad_band(temp_k, band=BAND):
    # Reference: Planck's law with scipy.constants (CODATA), adaptive quadrature.
    h, c, k = constants.h, constants.c, constants.k
    f = lambda lam: 2 * h * c ** 2 / lam ** 5 / np.expm1(h * c / (lam * k * temp_k))  # noqa: E731
    return integrate.quad(f, band[0] * 1e-6, band[1] * 1e-6, epsabs=0, epsrel=1e-11)[0]


def test_band_radiance_matches_quadrature():
    # scipy.integrate.quad of Planck's law, CODATA constants; 1e-6 relative (table + Simpson).
    rng = np.random.default_rng(SEED)
    for t in rng.uniform(-60.0, 150.0, 12) + constants.zero_Celsius:
        assert radiance.band_radiance(t, BAND) == pytest.approx(_quad_band(t), rel=1e-6)


def test_band_temperature_inverts_radiance():
    # brentq on the quadrature reference; 2 mK (table step 0.02 K, linear interpolation).
    rng = np.random.default_rng(SEED + 1)
    for t in rng.uniform(-40.0, 120.0, 8) + constants.zero_Celsius:
        lq = _quad_band(t)
        assert float(radiance.band_temperature(lq, BAND)) == pytest.approx(t, abs=2e-3)
    assert np.isnan(radiance.band_temperature(-1.0, BAND))


def test_wien_peak_at_40_c():
    # Wien's displacement law: lambda_max = b / T, b = 2.897771955e-3 m K (CODATA 2018),
    # 9.254 um at 40 degC ("near 9.26 um"); peak of the simulator's Planck function within 1 nm.
    t = 40.0 + constants.zero_Celsius
    b = constants.physical_constants["Wien wavelength displacement law constant"][0]
    peak = optimize.minimize_scalar(lambda lam: -radiance.planck(lam * 1e-6, t), bounds=(5, 15),
                                    method="bounded", options={"xatol": 1e-7}).x
    assert peak == pytest.approx(b / t * 1e6, abs=1e-3)
    assert peak == pytest.approx(9.26, abs=0.01)


def test_planck_over_all_wavelengths_is_stefan_boltzmann():
    # Stefan-Boltzmann: integral of pi * L over all wavelengths = sigma T^4 (sigma CODATA);
    # 1e-8 relative.
    t = 313.15
    total = integrate.quad(lambda lam: radiance.planck(lam, t), 1e-8, 1e-2, limit=400, epsrel=1e-12,
                           points=[5e-6, 1e-5, 3e-5])[0]
    assert np.pi * total == pytest.approx(constants.Stefan_Boltzmann * t ** 4, rel=1e-8)


def test_apparent_temperature_of_a_black_body_is_its_temperature():
    # eps = 1, tau = 1, export eps = 1: the measurement equation reduces to L(T_app) = L(T).
    t = np.linspace(-20.0, 90.0, 23)
    app = radiance.apparent_temperature(t, emissivity=1.0, temp_sky_c=-30.0, transmission=1.0,
                                        temp_air_c=20.0, export_emissivity=1.0, export_reflected_c=20.0)
    assert np.max(np.abs(app - t)) < 2e-3


def test_apparent_temperature_against_quadrature():
    # Reference measurement equation with quadrature band radiances and brentq; 5 mK.
    rng = np.random.default_rng(SEED + 2)
    for _ in range(5):
        t, sky, air = rng.uniform(20, 80), rng.uniform(-45, -5), rng.uniform(5, 35)
        eps, tau, eps_x, t_rx = rng.uniform(0.8, 0.95), rng.uniform(0.95, 1.0), rng.uniform(0.9, 1.0), 20.0
        k0 = constants.zero_Celsius
        ls = tau * (eps * _quad_band(t + k0) + (1 - eps) * _quad_band(sky + k0)) + (1 - tau) * _quad_band(air + k0)
        la = (ls - (1 - eps_x) * _quad_band(t_rx + k0)) / eps_x
        ref = optimize.brentq(lambda x, la=la: _quad_band(x) - la, 150, 500, xtol=1e-7) - k0
        got = radiance.apparent_temperature(t, emissivity=eps, temp_sky_c=sky, transmission=tau, temp_air_c=air,
                                            export_emissivity=eps_x, export_reflected_c=t_rx)
        assert float(got) == pytest.approx(ref, abs=5e-3)


def test_clear_sky_is_cold_in_the_window():
    # Common practice: a clear sky seen through the 8-14 um window is -20..-50 degC in summer
    # in dry air, far below the air; more humid air gives a warmer sky, still well below the air.
    dry = radiance.sky_temperature(25.0, 20.0, BAND)
    humid = radiance.sky_temperature(25.0, 80.0, BAND)
    assert -50.0 < dry < -20.0
    assert dry < humid < 25.0 - 15.0


def test_vapour_pressure_at_20_c():
    # Saturation vapour pressure at 20 degC is 23.39 hPa (handbook value, from memory); 0.5 %.
    assert radiance.vapour_pressure_hpa(20.0, 100.0) == pytest.approx(23.39, rel=5e-3)


def test_air_path_is_nearly_transparent_at_drone_altitude():
    # Common practice: the path correction is small at drone altitudes (0.98-0.999 at 30-120 m);
    # longer paths and wetter air transmit less.
    t30 = radiance.air_transmission(30.0, 25.0, 50.0)
    t120 = radiance.air_transmission(120.0, 25.0, 50.0)
    t120w = radiance.air_transmission(120.0, 25.0, 90.0)
    assert 0.9 < t120w < t120 < t30 < 1.0
    assert t30 > 0.98


def test_faiman_is_pvlibs():
    # Reference: pvlib.temperature.faiman (Faiman 2008, IEC 61853-2 coefficients); 1e-12.
    import pvlib

    g, ta, v = np.array([300.0, 870.0, 1100.0]), np.array([5.0, 26.5, 38.0]), np.array([0.5, 2.1, 6.0])
    np.testing.assert_allclose(electrical.faiman(g, ta, v), pvlib.temperature.faiman(g, ta, v), atol=1e-12)


def test_diode_module_meets_its_datasheet():
    # pvlib.pvsystem.singlediode at STC: Pmp = pmax (fitted), Voc and Isc as given (1e-3 rel).
    import pvlib

    m = electrical.diode_module({"pmax_w": 410.0, "cells_across": 6, "cells_along": 12,
                                 "voc_v": 49.1, "isc_a": 10.6})
    il, i0, rs, rsh, nv = pvlib.pvsystem.calcparams_desoto(1000.0, 25.0, m.alpha_sc, m.a_ref, m.isc_a,
                                                           m.i0_ref, 400.0, m.r_s, EgRef=m.eg_ref)
    out = pvlib.pvsystem.singlediode(il, i0, rs, rsh, nv)
    assert float(out["p_mp"]) == pytest.approx(410.0, rel=1e-3)
    assert float(out["v_oc"]) == pytest.approx(49.1, rel=1e-3)
    assert float(out["i_sc"]) == pytest.approx(10.6, rel=1e-3)
    # The datasheet's power temperature coefficient (-0.35 %/K by default) holds; 0.005 %/K.
    gamma = (m.p_mp(1000.0, 50.0) / m.p_mp(1000.0, 25.0) - 1.0) / 25.0 * 100.0
    assert gamma == pytest.approx(-0.35, abs=0.005)
    # and the band gap stays physical for silicon-like cells (0.9-1.4 eV)
    assert 0.9 < m.eg_ref < 1.4
