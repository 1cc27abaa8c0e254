r"""Transmission of the air path between camera and module in the camera band."""
from __future__ import annotations

import numpy as np
from scipy import constants as _const

from pvscan.physics._arrays import ArrayLike, Band, FloatOrArray
from pvscan.physics.planck import _ZERO_C, DEFAULT_BAND_UM, _band_key, _scalar, planck_spectral_radiance
from pvscan.physics.sky import saturation_vapour_pressure

__all__ = ["atmospheric_transmission"]

_R_VAPOUR = _const.R / 0.01801528  # specific gas constant of water vapour [J/(kg K)]


def atmospheric_transmission(
    distance_m: ArrayLike,
    temp_air_c: ArrayLike,
    relative_humidity_pct: ArrayLike = 50.0,
    *,
    pressure_hpa: float = 1013.25,
    band_um: Band = DEFAULT_BAND_UM,
) -> FloatOrArray:
    r"""Band transmission of the air path between camera and module.

    In the long-wave window the main absorber over short paths is the water-vapour
    continuum. Its mass absorption coefficient, after Roberts, Selby & Biberman [1]_
    (from memory), is

    .. math::

        k(\nu) = \left[4.18 + 5578\,e^{-7.87\times10^{-3}\nu}\right]
                 e^{1800\,(1/T - 1/296)}\,(e + 0.002\,P)
        \quad [\mathrm{cm^2\,g^{-1}}]

    with :math:`\nu` the wavenumber [1/cm], :math:`e` the vapour pressure and :math:`P`
    the air pressure [atm]; the spectral transmission is :math:`\exp(-k\,w)` with the
    water column :math:`w = \rho_v d` [g/cm2]. The band value is the average weighted by
    a black body at air temperature. Line absorption at the band edges is neglected, so
    the result is an upper bound; at 30-120 m it is 0.98-0.999 (common practice: the path
    correction is small at drone altitudes).

    Parameters
    ----------
    distance_m : array_like
        Path length camera-module [m].
    temp_air_c : array_like
        Air temperature [degC].
    relative_humidity_pct : array_like
        Relative humidity [%]. Default 50.
    pressure_hpa : float
        Air pressure [hPa]. Default 1013.25.
    band_um : (float, float)
        Camera band [um].

    Returns
    -------
    numpy.ndarray or float
        Band transmission [-] in 0..1.

    References
    ----------
    .. [1] R. E. Roberts, J. E. A. Selby and L. M. Biberman, "Infrared continuum
       absorption by atmospheric water vapor in the 8-12 um window", Applied Optics
       15(9), 2085-2090, 1976.
    """
    d = np.asarray(distance_m, dtype=float)
    t_air = np.asarray(temp_air_c, dtype=float)
    rh = np.asarray(relative_humidity_pct, dtype=float)
    d, t_air, rh = np.broadcast_arrays(d, t_air, rh)
    lo, hi = _band_key(band_um)
    nu = np.linspace(1e4 / hi, 1e4 / lo, 121)  # wavenumber grid [1/cm]
    e_hpa = rh / 100.0 * np.asarray(saturation_vapour_pressure(t_air))
    t_k = t_air + _ZERO_C
    rho_v = e_hpa * 100.0 / (_R_VAPOUR * t_k) * 1e3  # [g/m3]
    w = rho_v * d * 1e-4  # water column [g/cm2]
    e_atm = e_hpa / 1013.25
    p_atm = pressure_hpa / 1013.25
    k = (4.18 + 5578.0 * np.exp(-7.87e-3 * nu)) * np.exp(1800.0 * (1.0 / t_k[..., None] - 1.0 / 296.0))
    k = k * (e_atm + 0.002 * p_atm)[..., None]
    tau_nu = np.exp(-k * w[..., None])
    lam_m = 1e-2 / nu  # [m]
    # weights: spectral radiance per wavenumber = L_lambda * lambda^2
    weight = planck_spectral_radiance(lam_m, t_k[..., None]) * lam_m**2
    tau = np.sum(tau_nu * weight, axis=-1) / np.sum(weight, axis=-1)
    return _scalar(np.where(d >= 0, tau, np.nan))

