"""Radiometry against physics outside the project.

Sources named beside each check: CODATA constants via scipy.constants (h, c, k, Wien,
Stefan_Boltzmann), scipy.integrate.quad as an independent quadrature of Planck's law,
scipy.optimize as an independent root finder/optimiser, published formulae (Swinbank 1963,
Berdahl & Martin 1984, Alduchov & Eskridge 1996, Roberts et al. 1976, Fresnel), handbook
values of saturation vapour pressure and dew point.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import constants as C
from scipy import integrate, optimize

from pvscan.physics import radiometry as rad

ZERO_C = C.zero_Celsius
BAND = (7.5, 13.5)


def quad_band(temp_k, band_um=BAND):
    """Independent band radiance: adaptive quadrature of Planck's law (scipy.integrate.quad)."""
    lo, hi = band_um[0] * 1e-6, band_um[1] * 1e-6

    def planck(lam):
        return 2 * C.h * C.c**2 / lam**5 / math.expm1(C.h * C.c / (lam * C.k * temp_k))

    return integrate.quad(planck, lo, hi, epsabs=0.0, epsrel=1e-12, limit=200)[0]


# ----------------------------------------------------------------------------- Planck
@pytest.mark.parametrize(
    "temp_c, expect_um, tol_um",
    [(37.0, 9.3, 0.05), (300.0, 5.06, 0.05), (5500.0, 0.50, 0.02)],
)
def test_wien_displacement(temp_c, expect_um, tol_um):
    # Wien's displacement law, b = scipy.constants.Wien (CODATA); peak positions are facts of
    # the trade (body temperature ~9.3 um, 300 degC ~5 um, solar surface ~0.5 um).
    t = temp_c + ZERO_C
    b = C.Wien
    res = optimize.minimize_scalar(
        lambda lam_um: -rad.planck_spectral_radiance(lam_um * 1e-6, t),
        bracket=(0.5 * b / t * 1e6, b / t * 1e6, 2 * b / t * 1e6),
        tol=1e-12,
    )
    peak_um = res.x
    assert peak_um == pytest.approx(b / t * 1e6, rel=1e-6)  # optimiser precision
    assert abs(peak_um - expect_um) < tol_um


def test_planck_value_against_formula_constants():
    # Planck's law with the first and second radiation constants c1L = 2hc^2 and
    # c2 = hc/k (CODATA via scipy.constants); value at 10 um, 300 K.
    c1l = 2 * C.h * C.c**2
    c2 = C.h * C.c / C.k
    lam, t = 10e-6, 300.0
    expect = c1l / lam**5 / (math.exp(c2 / (lam * t)) - 1)
    assert rad.planck_spectral_radiance(lam, t) == pytest.approx(expect, rel=1e-13)
    # c2 = 1.438777 cm K, CODATA 2018 (from memory: 1.438776877e-2 m K)
    assert c2 == pytest.approx(1.438776877e-2, rel=1e-9)


def test_planck_broadcasts_and_nan():
    lam = np.array([8e-6, 10e-6, 12e-6])[:, None]
    t = np.array([250.0, 300.0, np.nan, -1.0])[None, :]
    out = rad.planck_spectral_radiance(lam, t)
    assert out.shape == (3, 4)
    assert np.all(np.isfinite(out[:, :2])) and np.all(np.isnan(out[:, 2:]))


# ----------------------------------------------------------------------------- band radiance
@pytest.mark.parametrize("temp_k", [200.0, 300.0, 700.0, 1000.0, 6000.0])
def test_stefan_boltzmann_wide_band(temp_k):
    # Stefan-Boltzmann: pi * integral over all wavelengths = sigma T^4 (scipy.constants,
    # CODATA). 0.1-1000 um misses < 2e-5 of the emission from 200 K to 6000 K.
    for method in ("exact", "lut"):
        total = math.pi * rad.band_radiance(temp_k, (0.1, 1000.0), method=method)
        assert total == pytest.approx(C.Stefan_Boltzmann * temp_k**4, rel=1e-4)
    # Practically infinite band: the series is exact to machine precision. rel 1e-10: CODATA
    # tabulates sigma to 10 digits, which scipy < 1.15 returns instead of the derived value.
    total = math.pi * rad.band_radiance(temp_k, (1e-4, 1e7), method="exact")
    assert total == pytest.approx(C.Stefan_Boltzmann * temp_k**4, rel=1e-10)


@pytest.mark.parametrize("temp_c", [-80.0, -20.0, 0.0, 25.0, 60.0, 120.0, 400.0])
@pytest.mark.parametrize("band", [BAND, (8.0, 14.0), (3.0, 5.0)])
def test_band_radiance_against_quadrature(temp_c, band):
    # Independent reference: scipy.integrate.quad of Planck's law, rel 1e-12 requested;
    # 1e-9 allowed for the table path (documented accuracy).
    t = temp_c + ZERO_C
    ref = quad_band(t, band)
    assert rad.band_radiance(t, band, method="exact") == pytest.approx(ref, rel=1e-11)
    assert rad.band_radiance(t, band) == pytest.approx(ref, rel=1e-9)


def test_lut_accuracy_over_range():
    # Documented: table error << 1 mK over -80..400 degC; check densely (not on nodes).
    t = np.linspace(-80.0, 400.0, 200_003) + ZERO_C
    exact = rad.band_radiance(t, method="exact")
    lut = rad.band_radiance(t)
    assert np.max(np.abs(lut / exact - 1)) < 1e-9
    back = rad.temperature_from_band_radiance(exact)
    assert np.max(np.abs(back - t)) < 1e-5  # [K], i.e. 0.01 mK
    back_exact = rad.temperature_from_band_radiance(exact[::1000], method="exact")
    assert np.max(np.abs(back_exact - t[::1000])) < 1e-9


def test_inverse_outside_table_and_bad_values():
    t = np.array([100.0, 150.0, 1200.0, 2500.0])  # [K], outside -120..620 degC
    r = rad.band_radiance(t, method="exact")
    assert np.allclose(rad.band_radiance(t), r, rtol=1e-12)
    assert np.allclose(rad.temperature_from_band_radiance(r), t, rtol=1e-9)
    out = rad.temperature_from_band_radiance(np.array([0.0, -1.0, np.nan, np.inf]))
    assert np.all(np.isnan(out))
    assert np.isnan(rad.band_radiance(-5.0)) and np.isnan(rad.band_radiance(np.nan))


def test_band_slope_matches_finite_difference():
    # Analytic dL/dT against a central difference of the exact integral.
    t = np.array([220.0, 300.0, 450.0])
    h = 1e-3
    fd = (rad.band_radiance(t + h, method="exact") - rad.band_radiance(t - h, method="exact")) / (2 * h)
    assert np.allclose(rad.band_radiance_slope(t), fd, rtol=1e-7)


def test_band_fraction_sums_to_one():
    # Fractions of adjacent bands add up; their sum over all wavelengths is 1 (Stefan-Boltzmann).
    t = 320.0
    parts = [(1e-3, 7.5), (7.5, 13.5), (13.5, 1e6)]
    assert sum(rad.band_fraction(t, b) for b in parts) == pytest.approx(1.0, abs=1e-10)
    # 8-14 um holds roughly a third of a 300 K body's emission (common practice: ~37 %).
    assert 0.3 < rad.band_fraction(300.0, (8.0, 14.0)) < 0.42


# ----------------------------------------------------------------------------- measurement equation
def test_round_trip_true_apparent_true():
    # Spec: round trip within 0.01 K over -20..120 degC, emissivity 0.85, sky -40..10 degC.
    t_true = np.linspace(-20.0, 120.0, 141)[:, None]
    sky = np.linspace(-40.0, 10.0, 11)[None, :]
    kw = dict(emissivity=0.85, temp_sky_c=sky, export_emissivity=0.95, export_reflected_c=20.0,
              transmission=0.98, temp_atm_c=25.0)
    app = rad.apparent_from_true(t_true, **kw)
    back = rad.true_from_apparent(app, **kw)
    assert back.shape == (141, 11)
    assert np.max(np.abs(back - t_true)) < 0.01
    assert np.max(np.abs(back - t_true)) < 1e-6  # what the tables deliver


def test_solution_against_independent_root_finding():
    # Solve the measurement equation with quad-integrated radiances and scipy.optimize.brentq.
    eps, t_sky, eps_x, t_rx, tau, t_atm = 0.85, -30.0, 0.95, 15.0, 0.97, 24.0
    t_app = 48.0
    l_sensor = eps_x * quad_band(t_app + ZERO_C) + (1 - eps_x) * quad_band(t_rx + ZERO_C)

    def residual(t_c):
        return (tau * (eps * quad_band(t_c + ZERO_C) + (1 - eps) * quad_band(t_sky + ZERO_C))
                + (1 - tau) * quad_band(t_atm + ZERO_C) - l_sensor)

    ref = optimize.brentq(residual, 0.0, 150.0, xtol=1e-10)
    got = rad.true_from_apparent(t_app, emissivity=eps, temp_sky_c=t_sky, export_emissivity=eps_x,
                                 export_reflected_c=t_rx, transmission=tau, temp_atm_c=t_atm)
    assert got == pytest.approx(ref, abs=1e-6)


@pytest.mark.parametrize("sky", [-60.0, -20.0, 0.0, 30.0])
def test_emissivity_one_is_identity(sky):
    # A black body reflects nothing: with eps = 1 (and the export's eps = 1, tau = 1)
    # the sky does not matter and the correction is the identity (common practice).
    t = np.array([-10.0, 25.0, 65.0, 110.0])
    assert np.allclose(rad.true_from_apparent(t, emissivity=1.0, temp_sky_c=sky), t, atol=1e-7)


def test_export_with_correct_assumptions_is_identity():
    # If the export already used the module's emissivity and the sky as reflected
    # temperature, the apparent temperature is the true one (consistency of the equation).
    t = np.array([5.0, 40.0, 90.0])
    out = rad.true_from_apparent(t, emissivity=0.85, temp_sky_c=-25.0, export_emissivity=0.85,
                                 export_reflected_c=-25.0)
    assert np.allclose(out, t, atol=1e-7)


def test_cold_sky_makes_export_under_read():
    # Common practice: a camera set to eps = 1 under-reads a warm module that reflects a
    # cold sky, and the colder the sky the larger the error.
    skies = np.array([10.0, -10.0, -30.0, -50.0])
    app = rad.apparent_from_true(55.0, emissivity=0.85, temp_sky_c=skies)
    assert np.all(app < 55.0)
    assert np.all(np.diff(app) < 0)
    # and with a sky warmer than the module the export over-reads
    assert rad.apparent_from_true(10.0, emissivity=0.85, temp_sky_c=30.0) > 10.0


def test_broadcast_per_module_against_cells_and_nan():
    rng = np.random.default_rng(7)
    cells = rng.uniform(30, 70, size=(5, 12, 6))
    cells[2, 3, 4] = np.nan
    sky = np.array([-40.0, -30.0, -20.0, -10.0, 0.0])
    out = rad.true_from_apparent(cells, emissivity=0.85, temp_sky_c=sky[:, None, None])
    assert out.shape == cells.shape
    assert np.isnan(out[2, 3, 4]) and np.isfinite(out).sum() == cells.size - 1
    for i in range(5):
        ref = rad.true_from_apparent(cells[i], emissivity=0.85, temp_sky_c=sky[i])
        assert np.allclose(out[i], ref, equal_nan=True)


def test_no_physical_solution_gives_nan_without_warnings():
    # Apparent radiance below the reflected part alone: no positive module radiance -> NaN.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = rad.true_from_apparent(np.array([-80.0, 20.0]), emissivity=0.1, temp_sky_c=10.0)
    assert np.isnan(out[0]) and np.isfinite(out[1])
    with warnings.catch_warnings():  # degenerate parameters give NaN, not warnings
        warnings.simplefilter("error")
        assert np.isnan(rad.true_from_apparent(40.0, emissivity=0.0, temp_sky_c=-20.0))
        assert np.isnan(rad.apparent_from_true(40.0, emissivity=0.85, temp_sky_c=-20.0, export_emissivity=0.0))
        assert np.isnan(rad.true_from_apparent(40.0, emissivity=0.85, temp_sky_c=-20.0, transmission=0.0,
                                               temp_atm_c=20.0))


def test_transmission_needs_path_temperature():
    with pytest.raises(TypeError, match="temp_atm_c"):
        rad.true_from_apparent(40.0, emissivity=0.85, temp_sky_c=-20.0, transmission=0.98)


def test_large_array_runs():
    # 1e6 elements through both directions (speed is benchmarked, not asserted).
    x = np.random.default_rng(3).uniform(10, 90, 1_000_000)
    y = rad.true_from_apparent(x, emissivity=0.85, temp_sky_c=-30.0)
    z = rad.apparent_from_true(y, emissivity=0.85, temp_sky_c=-30.0)
    assert np.max(np.abs(z - x)) < 1e-6


# ----------------------------------------------------------------------------- humidity and sky
@pytest.mark.parametrize("temp_c, hpa", [(0.0, 6.112), (20.0, 23.39), (30.0, 42.47), (40.0, 73.8)])
def test_saturation_vapour_pressure_handbook(temp_c, hpa):
    # Handbook values over water (e.g. CRC Handbook / WMO tables; from memory), Magnus
    # form of Alduchov & Eskridge (1996) stated accurate to ~0.4 % in -40..50 degC.
    assert rad.saturation_vapour_pressure(temp_c) == pytest.approx(hpa, rel=4e-3)


def test_dew_point_psychrometric():
    # 20 degC at 50 % RH has a dew point of 9.3 degC (psychrometric tables, common practice);
    # 100 % RH: the dew point is the air temperature.
    assert rad.dew_point(20.0, 50.0) == pytest.approx(9.3, abs=0.05)
    assert rad.dew_point(27.0, 100.0) == pytest.approx(27.0, abs=1e-9)
    assert np.isnan(rad.dew_point(20.0, 0.0))


def test_swinbank_broadband():
    # Swinbank (1963): L_sky = 5.31e-13 T^6 [W/m2] equals sigma T_sky^4, i.e. T_sky ~ 0.0552 T^1.5.
    for temp_c in (5.0, 20.0, 35.0):
        t = temp_c + ZERO_C
        t_sky = rad.sky_temperature(temp_c, band="broadband") + ZERO_C
        assert C.Stefan_Boltzmann * t_sky**4 == pytest.approx(5.31e-13 * t**6, rel=1e-12)
        # the rounded coefficient 0.0552 (vs (5.31e-13 / sigma)^0.25 = 0.05532) is 0.2 % off
        assert t_sky == pytest.approx(0.0552 * t**1.5, rel=3e-3)
    # hand value, 20 degC: (5.31e-13 / 5.670374e-8)^0.25 * 293.15^1.5 = 277.65 K = 4.50 degC
    assert rad.sky_temperature(20.0, band="broadband") == pytest.approx(4.50, abs=0.01)


def test_berdahl_martin_broadband():
    # Berdahl & Martin (1984): eps = 0.711 + 0.56 (Tdp/100) + 0.73 (Tdp/100)^2.
    # Hand value: 20 degC, 50 % RH, Tdp = 9.26 degC -> eps = 0.76912, T_sky = 0.76912^0.25 * 293.15 K.
    tdp = 9.26 / 100
    eps = 0.711 + 0.56 * tdp + 0.73 * tdp**2
    expect = eps**0.25 * (20 + ZERO_C) - ZERO_C
    assert rad.sky_temperature(20.0, 50.0, band="broadband") == pytest.approx(expect, abs=0.02)


def test_idso_window_value():
    # Idso (1981) 8-14 um clear-sky emissivity 0.24 + 2.98e-6 e^2 exp(3000/T), e [kPa]
    # (from memory). Hand value at 20 degC, 50 % RH: e = 1.1695 kPa, exp(3000/293.15) =
    # 27853 -> eps_w = 0.3535; sky = T with L_band(T) = eps_w L_band(293.15 K), solved with
    # quad + brentq.
    e = 0.5 * 2.339
    eps_w = 0.24 + 2.98e-6 * e**2 * math.exp(3000 / 293.15)
    target = eps_w * quad_band(293.15)
    ref = optimize.brentq(lambda t: quad_band(t) - target, 150.0, 300.0, xtol=1e-9) - ZERO_C
    # 0.1 K: the Magnus e (23.33 hPa) and the handbook e (23.39 hPa) differ by 0.25 %
    assert rad.sky_temperature(20.0, 50.0) == pytest.approx(ref, abs=0.1)


def test_camera_sky_colder_than_broadband_and_monotone():
    # Common practice: through the long-wave window the clear sky looks much colder than
    # its broadband temperature; warmer and moister air gives a warmer sky.
    t = np.array([5.0, 15.0, 25.0, 35.0])
    for rh in (None, 30.0, 60.0):
        cam = rad.sky_temperature(t, rh)
        broad = rad.sky_temperature(t, rh, band="broadband")
        assert np.all(cam < broad - 5.0)
        assert np.all(np.diff(cam) > 0)
    assert np.all(rad.sky_temperature(t, 70.0) > rad.sky_temperature(t, 30.0))
    # typical clear summer day: -45..-10 degC in the camera band (common practice)
    assert -45.0 < rad.sky_temperature(25.0, 40.0) < -10.0
    with pytest.raises(ValueError):
        rad.sky_temperature(20.0, band="visible")


# ----------------------------------------------------------------------------- atmosphere
def test_transmission_near_one_at_drone_altitudes():
    d = np.array([0.0, 30.0, 60.0, 120.0, 1000.0])
    tau = rad.atmospheric_transmission(d, 25.0, 60.0)
    assert tau[0] == pytest.approx(1.0, abs=1e-12)
    assert np.all(np.diff(tau) < 0)
    assert np.all((tau[1:4] > 0.95) & (tau[1:4] < 1.0))  # common practice: ~1-3 % at 30-120 m
    assert rad.atmospheric_transmission(60.0, 25.0, 90.0) < rad.atmospheric_transmission(60.0, 25.0, 20.0)


def test_transmission_continuum_formula_narrow_band():
    # Roberts, Selby & Biberman (1976) continuum (from memory) at 1000 1/cm (10 um):
    # k = (4.18 + 5578 exp(-7.87)) exp(1800 (1/T - 1/296)) (e + 0.002 P) [cm2/g], tau = exp(-k w).
    # Hand value: 20 degC, 50 % RH, 1 km. e = 11.695 hPa, rho_v = e / (R_v T) = 8.645 g/m3,
    # w = 0.8645 g/cm2.
    t = 293.15
    e_hpa = 0.5 * rad.saturation_vapour_pressure(20.0)
    r_v = C.R / 0.01801528
    w = e_hpa * 100 / (r_v * t) * 1e3 * 1000.0 * 1e-4
    k = (4.18 + 5578 * math.exp(-7.87e-3 * 1000)) * math.exp(1800 * (1 / t - 1 / 296)) * (e_hpa / 1013.25 + 0.002)
    expect = math.exp(-k * w)
    got = rad.atmospheric_transmission(1000.0, 20.0, 50.0, band_um=(9.995, 10.005))
    assert got == pytest.approx(expect, abs=2e-4)  # the narrow band spans +-0.5 1/cm


# ----------------------------------------------------------------------------- emissivity
def test_fresnel_emissivity_brewster_glass():
    # Fresnel (Born & Wolf 1.5): n = 1.5 has R0 = 0.04 (eps0 = 0.96); at Brewster's angle
    # atan(n) the p reflectance vanishes and Rs = sin^2(i - t) / sin^2(i + t) (an
    # independent form of the Fresnel formula).
    n = 1.5
    i = math.atan(n)
    t = math.asin(math.sin(i) / n)
    rs = math.sin(i - t) ** 2 / math.sin(i + t) ** 2
    eps0 = 1 - ((n - 1) / (n + 1)) ** 2
    got = rad.effective_emissivity(eps0, math.degrees(i))
    assert got == pytest.approx(1 - 0.5 * rs, abs=1e-12)
    assert rad.effective_emissivity(0.85, 0.0) == pytest.approx(0.85, abs=1e-12)
    e = rad.effective_emissivity(0.85, np.array([0.0, 30.0, 60.0, 80.0]))
    assert np.all(np.diff(e) < 0) and e[1] > 0.845  # nearly flat to 30 deg (common practice)


# ----------------------------------------------------------------------------- statistics
def test_mean_std_expansion_against_sampled_distribution():
    # Delta method vs the mean/std of transformed samples (seeded normal, s = 2 K).
    rng = np.random.default_rng(11)
    x = rng.normal(45.0, 2.0, 400_000)
    kw = dict(emissivity=0.85, temp_sky_c=-35.0)
    y = rad.true_from_apparent(x, **kw)
    m, s = rad.correct_mean_std(x.mean(), x.std(), **kw)
    assert m == pytest.approx(y.mean(), abs=2e-3)
    assert s == pytest.approx(y.std(), rel=2e-3)


def test_correct_statistics_table_and_arrays():
    import pandas as pd

    rng = np.random.default_rng(5)
    n = 4
    px = rng.normal(40.0, 1.5, size=(n, 2000))
    table = pd.DataFrame({
        "t_mean_c": px.mean(axis=1), "t_std_k": px.std(axis=1),
        "t_median_c": np.median(px, axis=1), "t_p95_c": np.percentile(px, 95, axis=1),
        "t_max_c": px.max(axis=1), "t_min_c": px.min(axis=1), "n_pixels": [2000] * n,
    })
    sky = np.array([-40.0, -30.0, -20.0, -10.0])
    kw = dict(emissivity=0.85, temp_sky_c=sky, export_emissivity=1.0, export_reflected_c=20.0)
    out = rad.correct_statistics(table, **kw)
    true_px = rad.true_from_apparent(px, emissivity=0.85, temp_sky_c=sky[:, None])
    # order statistics convert exactly (monotone map)
    assert np.allclose(out["t_median_c"], np.median(true_px, axis=1), atol=1e-9)
    assert np.allclose(out["t_max_c"], true_px.max(axis=1), atol=1e-9)
    assert np.allclose(out["t_mean_c"], true_px.mean(axis=1), atol=2e-3)
    assert np.allclose(out["t_std_k"], true_px.std(axis=1), rtol=3e-3)
    assert out["n_pixels"].tolist() == [2000] * n
    cells = rng.uniform(30, 60, size=(n, 12, 6))
    arrs = rad.correct_statistics({"cell_median": cells, "tile": np.zeros(n)}, **kw)
    assert np.allclose(arrs["cell_median"], rad.true_from_apparent(cells, emissivity=0.85,
                                                                   temp_sky_c=sky[:, None, None]))
    with pytest.raises(TypeError):
        rad.correct_statistics(table, emisivity=0.85, temp_sky_c=-20.0)


def test_flight_radiometry_wrapper():
    from types import SimpleNamespace as NS

    import pandas as pd

    flight = NS(module=NS(emissivity=0.85), ortho=NS(emissivity=1.0, reflected_c=20.0),
                flight=NS(altitude_m=None), layout=NS(tilt_deg=25.0))
    conds = pd.DataFrame({"temp_air": [25.0, 26.0], "temp_sky": [-30.0, -29.0],
                          "relative_humidity": [np.nan, 40.0]})
    settings = {"band_um": [7.5, 13.5], "default_altitude_m": 60.0, "default_relative_humidity_pct": 50.0,
                "atmosphere": True, "view_angle_from_tilt": True}
    kw = rad.flight_radiometry(flight, conds, settings)
    assert kw["emissivity"] == pytest.approx(rad.effective_emissivity(0.85, 25.0))
    assert kw["transmission"][0] == pytest.approx(rad.atmospheric_transmission(60.0, 25.0, 50.0))
    assert kw["transmission"][1] == pytest.approx(rad.atmospheric_transmission(60.0, 26.0, 40.0))
    out = rad.true_from_apparent(np.array([40.0, 41.0]), **kw)
    assert np.all(out > np.array([40.0, 41.0]))  # cold sky: the true glass is warmer


def test_directional_sky_diffusivity():
    # Diffusivity approximation (Elsasser 1942, common practice): the hemispherical flux
    # value equals the beam value at 1/cos(z) = 1.66, z = 52.97 deg; the zenith sky is the
    # coldest and the sky warms toward the horizon. Hand value at the zenith:
    # eps_z = 1 - (1 - eps_hemi)^(1/1.66).
    z53 = math.degrees(math.acos(1 / 1.66))
    for band in ("camera", "broadband"):
        hemi = rad.sky_temperature(25.0, 40.0, band=band)
        assert rad.sky_temperature(25.0, 40.0, band=band, zenith_deg=z53) == pytest.approx(hemi, abs=1e-9)
        z = rad.sky_temperature(25.0, 40.0, band=band, zenith_deg=np.array([0.0, 30.0, 60.0, 80.0]))
        assert np.all(np.diff(z) > 0) and z[0] < hemi < z[-1] < 25.0
    tdp = rad.dew_point(25.0, 40.0) / 100
    eps_h = 0.711 + 0.56 * tdp + 0.73 * tdp**2  # Berdahl & Martin (1984)
    eps_z = 1 - (1 - eps_h) ** (1 / 1.66)
    expect = eps_z**0.25 * (25.0 + ZERO_C) - ZERO_C
    assert rad.sky_temperature(25.0, 40.0, band="broadband", zenith_deg=0.0) == pytest.approx(expect, abs=1e-9)


def test_uncertainty_against_monte_carlo():
    # GUM first-order propagation (JCGM 100:2008) against a seeded Monte Carlo propagation
    # of distributions (JCGM 101:2008): same standard uncertainty within 3 %.
    rng = np.random.default_rng(2026)
    n = 200_000
    eps = rng.normal(0.85, 0.02, n)
    sky = rng.normal(-30.0, 10.0, n)
    mc = rad.true_from_apparent(45.0, emissivity=eps, temp_sky_c=sky).std()
    gum = rad.temperature_uncertainty(45.0, emissivity=0.85, temp_sky_c=-30.0)
    assert gum == pytest.approx(mc, rel=0.03)
    # with eps = 1 the glass reflects nothing: the sky's uncertainty does not matter
    only_sky = rad.temperature_uncertainty(45.0, emissivity=1.0, temp_sky_c=-30.0, emissivity_sd=0.0)
    assert only_sky == pytest.approx(0.0, abs=1e-6)


def test_topic_modules_and_radiometry_share_one_copy_of_each_function():
    # The physics is split by topic; pvscan.physics.radiometry keeps the public names of all.
    from pvscan.physics import atmosphere, planck, sky

    for mod in (planck, sky, atmosphere):
        for name in mod.__all__:
            assert name in rad.__all__ and getattr(rad, name) is getattr(mod, name), name
    # and the split changed no value: Wien's displacement law (CODATA via scipy.constants) puts
    # the spectral peak of a 300 K black body at b / T
    lam = C.Wien / 300.0
    peak = planck.planck_spectral_radiance(np.array([0.999, 1.0, 1.001]) * lam, 300.0)
    assert peak[1] > peak[0] and peak[1] > peak[2]
