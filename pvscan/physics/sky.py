r"""Humidity and the apparent temperature of a clear sky, broadband and in the camera band.

The glass of a module reflects the sky; a long-wave camera sees that sky through the
atmospheric window, much colder than the air (:func:`sky_temperature`).
"""
from __future__ import annotations

import numpy as np
from scipy import constants as _const

from pvscan.physics._arrays import ArrayLike, Band, FloatOrArray
from pvscan.physics.planck import _ZERO_C, DEFAULT_BAND_UM, _band_key, _scalar, _table, band_fraction

__all__ = ["saturation_vapour_pressure", "dew_point", "sky_temperature"]

# Magnus formula coefficients over water (Alduchov & Eskridge 1996).
_MAGNUS_A = 17.625
_MAGNUS_B = 243.04  # [degC]
_MAGNUS_E0 = 6.1094  # [hPa]


def saturation_vapour_pressure(temp_air_c: ArrayLike) -> FloatOrArray:
    """Saturation vapour pressure over water (Magnus formula).

    Parameters
    ----------
    temp_air_c : array_like
        Air temperature [degC].

    Returns
    -------
    numpy.ndarray or float
        Saturation vapour pressure [hPa].

    References
    ----------
    .. [1] O. A. Alduchov and R. E. Eskridge, "Improved Magnus form approximation of
       saturation vapor pressure", Journal of Applied Meteorology 35(4), 601-609, 1996.
    """
    t = np.asarray(temp_air_c, dtype=float)
    return _scalar(_MAGNUS_E0 * np.exp(_MAGNUS_A * t / (t + _MAGNUS_B)))


def dew_point(temp_air_c: ArrayLike, relative_humidity_pct: ArrayLike) -> FloatOrArray:
    """Dew point temperature from air temperature and relative humidity (Magnus formula).

    Parameters
    ----------
    temp_air_c : array_like
        Air temperature [degC].
    relative_humidity_pct : array_like
        Relative humidity [%], 0..100.

    Returns
    -------
    numpy.ndarray or float
        Dew point [degC]; NaN where the humidity is not positive.

    References
    ----------
    .. [1] O. A. Alduchov and R. E. Eskridge, Journal of Applied Meteorology 35(4),
       601-609, 1996.
    """
    t = np.asarray(temp_air_c, dtype=float)
    rh = np.asarray(relative_humidity_pct, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.log(np.where(rh > 0, rh, np.nan) / 100.0) + _MAGNUS_A * t / (_MAGNUS_B + t)
        return _scalar(_MAGNUS_B * g / (_MAGNUS_A - g))


def _broadband_sky_emissivity(temp_air_c: ArrayLike, relative_humidity_pct: ArrayLike | None) -> np.ndarray:
    t_k = np.asarray(temp_air_c, dtype=float) + _ZERO_C
    if relative_humidity_pct is None:
        # Swinbank (1963): L_sky = 5.31e-13 T^6 [W/m2]  ->  eps = 5.31e-13 T^2 / sigma
        return 5.31e-13 * t_k**2 / _const.Stefan_Boltzmann
    tdp = np.asarray(dew_point(temp_air_c, relative_humidity_pct), dtype=float) / 100.0
    # Berdahl & Martin (1984), clear sky: eps = 0.711 + 0.56 Tdp/100 + 0.73 (Tdp/100)^2
    return 0.711 + 0.56 * tdp + 0.73 * tdp**2


def _window_sky_emissivity(temp_air_c: ArrayLike, relative_humidity_pct: ArrayLike | None,
                           band: tuple[float, float]) -> np.ndarray:
    t_air = np.asarray(temp_air_c, dtype=float)
    t_k = t_air + _ZERO_C
    if relative_humidity_pct is not None:
        # Idso (1981), 8-14 um clear sky: eps_w = 0.24 + 2.98e-6 e^2 exp(3000/T), e [kPa]
        e_kpa = 0.1 * np.asarray(relative_humidity_pct, dtype=float) / 100.0 * saturation_vapour_pressure(t_air)
        eps_w = 0.24 + 2.98e-6 * e_kpa**2 * np.exp(3000.0 / t_k)
        # The window is the most transparent part of the spectrum: never above broadband.
        eps_w = np.minimum(eps_w, _broadband_sky_emissivity(t_air, relative_humidity_pct))
    else:
        # Two-band split of Swinbank's broadband emissivity: black outside the camera band.
        eps_b = _broadband_sky_emissivity(t_air, None)
        eps_w = 1.0 - (1.0 - eps_b) / np.asarray(band_fraction(t_k, band))
        eps_w = np.maximum(eps_w, 0.24)
    return np.clip(eps_w, 0.0, 1.0)


_DIFFUSIVITY = 1.66  # Elsasser's diffusivity factor (common practice in radiative transfer)


def _directional_emissivity(eps_hemi: ArrayLike, zenith_deg: ArrayLike) -> np.ndarray:
    """Sky emissivity along one zenith angle from its hemispherical value (diffusivity approximation)."""
    cos_z = np.cos(np.radians(np.clip(np.asarray(zenith_deg, dtype=float), 0.0, 85.0)))
    return 1.0 - (1.0 - np.asarray(eps_hemi, dtype=float)) ** (1.0 / (_DIFFUSIVITY * cos_z))


def sky_temperature(temp_air_c: ArrayLike, relative_humidity_pct: ArrayLike | None = None, *,
                    band: str = "camera", band_um: Band = DEFAULT_BAND_UM,
                    zenith_deg: ArrayLike | None = None) -> FloatOrArray:
    r"""Apparent temperature of a clear sky.

    *Broadband* (``band="broadband"``): the temperature of a black body emitting the
    same total long-wave flux as the sky, :math:`T_{sky} = \varepsilon_{sky}^{1/4} T_{air}`,
    with the clear-sky emissivity of Berdahl & Martin [2]_ when the humidity is known,
    :math:`\varepsilon = 0.711 + 0.56\,(T_{dp}/100) + 0.73\,(T_{dp}/100)^2`
    (dew point :math:`T_{dp}` [degC] from :func:`dew_point`), else Swinbank's [1]_
    :math:`L_{sky} = 5.31\times10^{-13}\,T_{air}^6` [W/m2], i.e.
    :math:`T_{sky} = 0.0552\,T_{air}^{1.5}` [K].

    *Camera band* (``band="camera"``, default): a long-wave camera looks through the
    atmospheric window (about 8-13 um), where water vapour and CO2 absorb and emit far less
    than in the rest of the thermal infrared. The sky it sees (and the glass reflects) is
    therefore much colder than the broadband sky temperature: typically -20..-50 degC on a
    clear summer day against 0..+15 degC broadband (common practice). The camera-band sky
    temperature is the temperature whose band radiance equals
    :math:`\varepsilon_w L_{band}(T_{air})`, with the window emissivity
    :math:`\varepsilon_w`

    - with humidity: Idso's 8-14 um clear-sky formula [3]_
      :math:`\varepsilon_w = 0.24 + 2.98\times10^{-6}\,e^2\,e^{3000/T_{air}}` with the vapour
      pressure :math:`e` [kPa] and :math:`T_{air}` [K] (from memory; with :math:`e` in hPa
      the second term would exceed 1 at ordinary humidity, so kPa is the consistent unit),
      capped at the broadband emissivity (the window is the most transparent part of the
      spectrum, so its emissivity cannot exceed the broadband value; this matters only in
      hot, very humid air outside the range the formula was fitted on);
    - without humidity: a two-band split of Swinbank's broadband emissivity, assuming the
      sky is black outside the camera band so that the whole deficit lies in the band:
      :math:`\varepsilon_w = 1 - (1 - \varepsilon_b)/f`, :math:`f` = :func:`band_fraction`
      of a black body at air temperature, floored at Idso's dry-air value 0.24 (own model,
      documented here).

    Both are hemispherical (flux) values. For a near-nadir camera over a module tilted by
    :math:`\beta` the glass reflects the sky at a zenith angle of :math:`2\beta`. With
    ``zenith_deg`` the sky is taken along that one direction instead: by the diffusivity
    approximation of radiative transfer (the flux transmittance of a plane-parallel
    atmosphere equals its beam transmittance along a path 1.66 times the vertical, i.e.
    at about 53 deg zenith; Elsasser 1942, common practice) the directional emissivity is
    :math:`\varepsilon(\theta) = 1 - (1 - \varepsilon_{hemi})^{1/(1.66 \cos\theta)}`.
    So the hemispherical value fits tilts of ~25 deg; flatter modules reflect a colder,
    steeper ones a warmer sky.

    Parameters
    ----------
    temp_air_c : array_like
        Air temperature near the ground [degC].
    relative_humidity_pct : array_like, optional
        Relative humidity [%]. Without it the humidity-free models are used; NaN entries
        of a given array give NaN.
    band : {"camera", "broadband"}
        Which sky temperature to return.
    band_um : (float, float)
        Camera band [um] for ``band="camera"``.
    zenith_deg : array_like, optional
        Zenith angle of the direction seen [deg] (0 = straight up; clipped at 85 deg).
        Default: the hemispherical value.

    Returns
    -------
    numpy.ndarray or float
        Apparent sky temperature [degC].

    References
    ----------
    .. [1] W. C. Swinbank, "Long-wave radiation from clear skies", Quarterly Journal of
       the Royal Meteorological Society 89(381), 339-348, 1963.
    .. [2] P. Berdahl and M. Martin, "Emissivity of clear skies", Solar Energy 32(5),
       663-664, 1984.
    .. [3] S. B. Idso, "A set of equations for full spectrum and 8- to 14-um and 10.5- to
       12.5-um thermal radiation from cloudless skies", Water Resources Research 17(2),
       295-304, 1981.
    .. [4] W. M. Elsasser, Heat Transfer by Infrared Radiation in the Atmosphere, Harvard
       Meteorological Studies 6, 1942 (diffusivity factor 1.66).
    """
    t_air = np.asarray(temp_air_c, dtype=float)
    t_k = t_air + _ZERO_C
    if band == "broadband":
        eps = np.clip(_broadband_sky_emissivity(t_air, relative_humidity_pct), 0.0, 1.0)
        if zenith_deg is not None:
            eps = _directional_emissivity(eps, zenith_deg)
        return _scalar(eps**0.25 * t_k - _ZERO_C)
    if band != "camera":
        raise ValueError(f"band={band!r}: expected 'camera' or 'broadband'")
    key = _band_key(band_um)
    eps_w = _window_sky_emissivity(t_air, relative_humidity_pct, key)
    if zenith_deg is not None:
        eps_w = _directional_emissivity(eps_w, zenith_deg)
    with np.errstate(invalid="ignore"):
        l_sky = eps_w * _table(key).forward(t_k)
    return _scalar(_table(key).inverse(l_sky) - _ZERO_C)

