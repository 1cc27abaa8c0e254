"""The simulator's own radiometry: band radiance, the camera's measurement, sky and air path.

Written from the published formulae and scipy alone (it shares no code with the pipeline,
whose measurement it is meant to check):

- **Planck's law** with the CODATA constants of :mod:`scipy.constants`,
  ``L(lambda, T) = 2 h c^2 / lambda^5 / (exp(h c / (lambda k T)) - 1)`` [W/(m2 sr m)],
  integrated over the camera band by :func:`scipy.integrate.simpson` on a fine wavelength
  grid (401 points; the error against adaptive quadrature is below 1e-8 relative).
- **Lookup table**: band radiance is tabulated from -150 to 300 degC every 0.02 K; forward
  values and the inverse (radiance -> temperature) are read by linear interpolation of the
  monotone table (error below 1e-4 K).
- **Measurement**: the sensor sees
  ``L_s = tau * (eps * L(T) + (1 - eps) * L(T_sky)) + (1 - tau) * L(T_air)``; an export that
  assumed emissivity ``eps_x`` and reflected temperature ``T_rx`` reports the ``T_app`` with
  ``eps_x * L(T_app) + (1 - eps_x) * L(T_rx) = L_s``.
- **Sky** seen by a long-wave camera: window emissivity of Idso [1]_ (8-14 um clear sky),
  ``eps_w = 0.24 + 2.98e-6 e^2 exp(3000 / T)`` (``e`` vapour pressure [kPa], ``T`` air [K];
  from memory), capped by Brutsaert's broadband clear-sky emissivity [2]_
  ``1.24 (e / T)^(1/7)`` (``e`` [hPa]); ``L(T_sky) = eps_w * L(T_air)``. Vapour pressure by the
  Magnus form with the coefficients of Alduchov & Eskridge [3]_.
- **Air path**: water-vapour continuum absorption (Roberts, Selby & Biberman [4]_, from
  memory), band-averaged with a black body at air temperature as weight.

References
----------
.. [1] S. B. Idso, "A set of equations for full spectrum and 8- to 14-um and 10.5- to
   12.5-um thermal radiation from cloudless skies", Water Resources Research 17(2),
   295-304, 1981.
.. [2] W. Brutsaert, "On a derivable formula for long-wave radiation from clear skies",
   Water Resources Research 11(5), 742-744, 1975.
.. [3] O. A. Alduchov and R. E. Eskridge, "Improved Magnus form approximation of
   saturation vapor pressure", J. Applied Meteorology 35(4), 601-609, 1996.
.. [4] R. E. Roberts, J. E. A. Selby and L. M. Biberman, "Infrared continuum absorption by
   atmospheric water vapor in the 8-12 um window", Applied Optics 15(9), 2085-2090, 1976.
"""
from __future__ import annotations

import functools
import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants, integrate

from pvscan._typing import FloatArray

__all__ = ["planck", "band_radiance", "band_temperature", "apparent_temperature",
           "vapour_pressure_hpa", "sky_temperature", "air_transmission", "ZERO_C"]

ZERO_C = constants.zero_Celsius  # [K]
_T_MIN_C, _T_MAX_C, _T_STEP_K = -150.0, 300.0, 0.02
_N_WAVELENGTHS = 401


def planck(wavelength_m: ArrayLike, temp_k: ArrayLike) -> FloatArray:
    """Spectral radiance of a black body, Planck's law [W/(m2 sr m)].

    Parameters
    ----------
    wavelength_m : array_like
        Wavelength [m].
    temp_k : array_like
        Temperature [K].
    """
    lam = np.asarray(wavelength_m, float)
    t = np.asarray(temp_k, float)
    h, c, k = constants.h, constants.c, constants.k
    with np.errstate(over="ignore"):
        return 2.0 * h * c ** 2 / lam ** 5 / np.expm1(h * c / (lam * k * t))


def _band_integral(temp_k: FloatArray, band_um: tuple[float, ...]) -> FloatArray:
    lam = np.linspace(band_um[0], band_um[1], _N_WAVELENGTHS) * 1e-6
    out = np.empty(temp_k.shape)
    for i0 in range(0, temp_k.size, 2000):  # bounded memory
        t = temp_k[i0:i0 + 2000, None]
        out[i0:i0 + 2000] = integrate.simpson(planck(lam[None, :], t), x=lam, axis=1)
    return out


@functools.lru_cache(maxsize=8)
def _table(band_um: tuple[float, ...]) -> tuple[FloatArray, FloatArray]:
    temp_k = np.arange(_T_MIN_C, _T_MAX_C + _T_STEP_K / 2, _T_STEP_K) + ZERO_C
    return temp_k, _band_integral(temp_k, band_um)


def band_radiance(temp_k: ArrayLike, band_um: Sequence[float] = (7.5, 13.5)) -> FloatArray:
    """Radiance of a black body integrated over the camera band [W/(m2 sr)].

    Parameters
    ----------
    temp_k : array_like
        Temperature [K], within -150..300 degC.
    band_um : (float, float)
        Camera band [um].
    """
    tk, lk = _table(tuple(float(b) for b in band_um))
    return np.interp(np.asarray(temp_k, float), tk, lk)


def band_temperature(radiance: ArrayLike, band_um: Sequence[float] = (7.5, 13.5)) -> FloatArray:
    """Inverse of :func:`band_radiance`: the black-body temperature of a band radiance [K].

    Radiances outside the table give NaN.
    """
    tk, lk = _table(tuple(float(b) for b in band_um))
    return np.interp(np.asarray(radiance, float), lk, tk, left=np.nan, right=np.nan)


def apparent_temperature(temp_c: ArrayLike, *, emissivity: ArrayLike, temp_sky_c: ArrayLike,
                         transmission: ArrayLike, temp_air_c: ArrayLike, export_emissivity: float,
                         export_reflected_c: float, band_um: Sequence[float] = (7.5, 13.5)) -> FloatArray:
    """Apparent temperature the camera export writes for a surface [degC].

    Parameters
    ----------
    temp_c : array_like
        True surface temperature [degC].
    emissivity : array_like
        Surface emissivity in the camera band [-].
    temp_sky_c : array_like
        Apparent temperature of what the surface reflects [degC].
    transmission : array_like
        Band transmission of the air path [-].
    temp_air_c : array_like
        Air temperature (path emission) [degC].
    export_emissivity : float
        Emissivity the export assumed [-].
    export_reflected_c : float
        Reflected temperature the export assumed [degC].
    band_um : (float, float)
        Camera band [um].
    """
    b = band_um
    eps = np.asarray(emissivity, float)
    tau = np.asarray(transmission, float)
    l_surface = eps * band_radiance(np.asarray(temp_c, float) + ZERO_C, b) + \
        (1.0 - eps) * band_radiance(np.asarray(temp_sky_c, float) + ZERO_C, b)
    l_sensor = tau * l_surface + (1.0 - tau) * band_radiance(np.asarray(temp_air_c, float) + ZERO_C, b)
    eps_x = float(export_emissivity)
    l_app = (l_sensor - (1.0 - eps_x) * band_radiance(float(export_reflected_c) + ZERO_C, b)) / eps_x
    return band_temperature(l_app, b) - ZERO_C


def vapour_pressure_hpa(temp_air_c: ArrayLike, relative_humidity_pct: ArrayLike) -> FloatArray:
    """Vapour pressure, Magnus form of Alduchov & Eskridge (1996) [hPa]."""
    t = np.asarray(temp_air_c, float)
    return np.asarray(relative_humidity_pct, float) / 100.0 * 6.1094 * np.exp(17.625 * t / (t + 243.04))


def sky_temperature(temp_air_c: float, relative_humidity_pct: float,
                    band_um: Sequence[float] = (7.5, 13.5)) -> float:
    """Apparent clear-sky temperature in the camera band [degC] (Idso 1981, capped by
    Brutsaert 1975; see the module notes)."""
    t = float(temp_air_c) + ZERO_C
    e_hpa = float(vapour_pressure_hpa(temp_air_c, relative_humidity_pct))
    eps_w = 0.24 + 2.98e-6 * (e_hpa / 10.0) ** 2 * math.exp(3000.0 / t)
    eps_w = min(eps_w, 1.24 * (e_hpa / t) ** (1.0 / 7.0), 1.0)
    return float(band_temperature(eps_w * band_radiance(t, band_um), band_um)) - ZERO_C


def air_transmission(distance_m: ArrayLike, temp_air_c: ArrayLike, relative_humidity_pct: ArrayLike,
                     band_um: Sequence[float] = (7.5, 13.5), pressure_hpa: float = 1013.25) -> FloatArray | float:
    """Band transmission of an air path by water-vapour continuum absorption [-].

    ``k(nu) = (4.18 + 5578 exp(-7.87e-3 nu)) exp(1800 (1/T - 1/296)) (e + 0.002 P)``
    [cm2/g] (``nu`` wavenumber [1/cm], ``e`` and ``P`` [atm]); spectral transmission
    ``exp(-k w)`` with the water column ``w = rho_v d`` [g/cm2]; averaged over the band with
    a black body at air temperature as weight.
    """
    t_air = np.asarray(temp_air_c, float)
    shape = np.broadcast(np.asarray(distance_m), t_air, np.asarray(relative_humidity_pct)).shape
    d = np.broadcast_to(np.asarray(distance_m, float), shape).ravel()
    t = np.broadcast_to(t_air, shape).ravel() + ZERO_C
    e_hpa = np.broadcast_to(vapour_pressure_hpa(t_air, relative_humidity_pct), shape).ravel()
    rho_v = e_hpa * 100.0 * 0.018015 / (constants.R * t) * 1e-3  # [g/cm3]
    w = rho_v * d * 100.0                                           # [g/cm2]
    lam = np.linspace(band_um[0], band_um[1], 121) * 1e-6
    nu = 1.0 / (lam * 100.0)                                        # [1/cm]
    e_atm, p_atm = e_hpa / 1013.25, pressure_hpa / 1013.25
    k = (4.18 + 5578.0 * np.exp(-7.87e-3 * nu[None, :])) * \
        np.exp(1800.0 * (1.0 / t[:, None] - 1.0 / 296.0)) * (e_atm[:, None] + 0.002 * p_atm)
    weight = planck(lam[None, :], t[:, None])
    tau = integrate.simpson(weight * np.exp(-k * w[:, None]), x=lam, axis=1) / \
        integrate.simpson(weight, x=lam, axis=1)
    return tau.reshape(shape) if shape else float(tau[0])
