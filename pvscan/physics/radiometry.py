r"""Radiometry: from the temperature an export reports to the true glass temperature.

A thermal camera measures band radiance, not temperature. Long-wave microbolometer cameras
integrate over roughly 7.5-13.5 um; the radiance reaching the sensor from a module is

.. math::

    L_{sensor} = \tau \left[\varepsilon L(T_{obj}) + (1 - \varepsilon) L(T_{refl})\right]
                 + (1 - \tau) L(T_{atm})

with :math:`L(T)` Planck's law integrated over the camera band (:func:`band_radiance`),
:math:`\varepsilon` the emissivity of the front glass in that band, :math:`T_{refl}` the
apparent temperature of what the glass reflects (for a near-nadir camera over a tilted
module: the sky, :func:`sky_temperature`), :math:`\tau` the transmission of the air path
(:func:`atmospheric_transmission`) and :math:`T_{atm}` the air temperature along the path.

An orthomosaic holds temperatures that the camera's export already computed with its own
assumptions: an emissivity :math:`\varepsilon_x`, a reflected temperature
:math:`T_{refl,x}` and no atmosphere (:math:`\tau = 1`):

.. math::

    \varepsilon_x L(T_{app}) + (1 - \varepsilon_x) L(T_{refl,x}) = L_{sensor}

:func:`true_from_apparent` recovers :math:`L_{sensor}` from the apparent temperature and
solves the first equation for :math:`T_{obj}`; :func:`apparent_from_true` is its exact
inverse (used by the simulator). Both are monotonic in the temperature, so order
statistics (median, percentiles, min, max) convert exactly, and the mean and standard
deviation convert through a second-order expansion (:func:`correct_statistics`).

The physics is split by topic: :mod:`pvscan.physics.planck` (Planck's law, band radiance
and its fast tables), :mod:`pvscan.physics.sky` (humidity, sky temperature) and
:mod:`pvscan.physics.atmosphere` (path transmission); this module holds the measurement
equation, the glass emissivity, the conversion of statistics and the flight's radiometric
keywords, and re-exports the public names of the other three.

References
----------
.. [1] M. Planck, "Ueber das Gesetz der Energieverteilung im Normalspectrum",
   Annalen der Physik 309(3), 553-563, 1901.
.. [2] W. K. Widger and M. P. Woodall, "Integration of the Planck blackbody radiation
   function", Bulletin of the American Meteorological Society 57(10), 1217-1219, 1976.
.. [3] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

from pvscan.physics._arrays import ArrayLike, Band, FloatOrArray
from pvscan.physics.atmosphere import atmospheric_transmission
from pvscan.physics.planck import (
    _ZERO_C,
    DEFAULT_BAND_UM,
    _band_key,
    _scalar,
    _table,
    band_fraction,
    band_radiance,
    band_radiance_slope,
    planck_spectral_radiance,
    temperature_from_band_radiance,
)
from pvscan.physics.sky import dew_point, saturation_vapour_pressure, sky_temperature

if TYPE_CHECKING:
    from pvscan.io.manifest import Flight

#: A statistics table or mapping of arrays, returned as the same type.
Stats = TypeVar("Stats")

__all__ = [
    "DEFAULT_BAND_UM",
    "planck_spectral_radiance",
    "band_radiance",
    "band_radiance_slope",
    "band_fraction",
    "temperature_from_band_radiance",
    "true_from_apparent",
    "apparent_from_true",
    "dew_point",
    "saturation_vapour_pressure",
    "sky_temperature",
    "atmospheric_transmission",
    "effective_emissivity",
    "correct_mean_std",
    "correct_statistics",
    "temperature_uncertainty",
    "flight_radiometry",
]

logger = logging.getLogger(__name__)

#: Default camera band [um]: uncooled long-wave microbolometers (common practice).

# ---------------------------------------------------------------------------------------
# Measurement equation
# ---------------------------------------------------------------------------------------
def _radiance_c(temp_c: ArrayLike, band: tuple[float, float]) -> np.ndarray:
    return _table(band).forward(np.asarray(temp_c, dtype=float) + _ZERO_C)


def _prepare(transmission: ArrayLike, temp_atm_c: ArrayLike | None) -> tuple[np.ndarray, np.ndarray | None]:
    tau = np.asarray(transmission, dtype=float)
    if temp_atm_c is None:
        if np.any(tau != 1.0):
            raise TypeError("temp_atm_c is required when transmission differs from 1")
        return tau, None
    return tau, np.asarray(temp_atm_c, dtype=float)


def true_from_apparent(
    temp_apparent_c: ArrayLike,
    *,
    emissivity: ArrayLike,
    temp_sky_c: ArrayLike,
    export_emissivity: ArrayLike = 1.0,
    export_reflected_c: ArrayLike = 20.0,
    transmission: ArrayLike = 1.0,
    temp_atm_c: ArrayLike | None = None,
    band_um: Band = DEFAULT_BAND_UM,
) -> FloatOrArray:
    r"""True glass temperature from the apparent temperature an export reports.

    Solves the measurement equation of the module docstring:
    :math:`L_{s} = \varepsilon_x L(T_{app}) + (1-\varepsilon_x) L(T_{refl,x})` and
    :math:`T = L^{-1}\big([L_s - (1-\tau) L(T_{atm}) - \tau (1-\varepsilon) L(T_{sky})]
    / (\tau\varepsilon)\big)`.

    All arguments broadcast with numpy rules (per-pixel arrays, or per-module arrays of
    shape ``(n, 1, 1)`` against an ``(n, a, b)`` statistics array).

    Parameters
    ----------
    temp_apparent_c : array_like
        Apparent temperature the export wrote [degC].
    emissivity : array_like
        Emissivity of the module glass in the camera band [-].
    temp_sky_c : array_like
        Apparent temperature of what the glass reflects (sky) in the camera band [degC].
    export_emissivity : array_like
        Emissivity the export assumed [-]. Default 1.0.
    export_reflected_c : array_like
        Reflected temperature the export assumed [degC]. Default 20.0.
    transmission : array_like
        Band transmission of the air path camera-module [-]. Default 1.0.
    temp_atm_c : array_like, optional
        Air temperature along the path [degC]; required when ``transmission`` is not 1.
    band_um : (float, float)
        Camera band [um].

    Returns
    -------
    numpy.ndarray or float
        True glass temperature [degC]. NaN where an input is NaN or where the radiance
        left for the module is not positive (no physical solution).

    References
    ----------
    .. [1] IEC TS 62446-3:2017, Outdoor infrared thermography of PV modules and plants
       (emissivity and reflected temperature in thermography: common practice).
    """
    band = _band_key(band_um)
    tau, t_atm = _prepare(transmission, temp_atm_c)
    eps = np.asarray(emissivity, dtype=float)
    eps_x = np.asarray(export_emissivity, dtype=float)
    l_sensor = eps_x * _radiance_c(temp_apparent_c, band)
    if np.any(eps_x != 1.0):
        l_sensor = l_sensor + (1.0 - eps_x) * _radiance_c(export_reflected_c, band)
    l_refl = (1.0 - eps) * _radiance_c(temp_sky_c, band)
    with np.errstate(divide="ignore", invalid="ignore"):  # eps or tau = 0: no solution, NaN
        if t_atm is None:
            l_obj = (l_sensor - l_refl) / eps
        else:
            l_obj = (l_sensor - (1.0 - tau) * _radiance_c(t_atm, band) - tau * l_refl) / (tau * eps)
        bad = ~((l_obj > 0) & np.isfinite(l_obj))
    l_obj = np.where(bad, np.nan, l_obj)
    return _scalar(_table(band).inverse(l_obj) - _ZERO_C)


def apparent_from_true(
    temp_module_c: ArrayLike,
    *,
    emissivity: ArrayLike,
    temp_sky_c: ArrayLike,
    export_emissivity: ArrayLike = 1.0,
    export_reflected_c: ArrayLike = 20.0,
    transmission: ArrayLike = 1.0,
    temp_atm_c: ArrayLike | None = None,
    band_um: Band = DEFAULT_BAND_UM,
) -> FloatOrArray:
    """Apparent temperature an export would report for a true glass temperature.

    Exact inverse of :func:`true_from_apparent` (same keywords, same broadcasting).

    Parameters
    ----------
    temp_module_c : array_like
        True glass temperature [degC].
    emissivity, temp_sky_c, export_emissivity, export_reflected_c, transmission, temp_atm_c, band_um
        As in :func:`true_from_apparent` ([-], [degC], [-], [degC], [-], [degC], [um]).

    Returns
    -------
    numpy.ndarray or float
        Apparent temperature [degC]; NaN where no physical solution exists.
    """
    band = _band_key(band_um)
    tau, t_atm = _prepare(transmission, temp_atm_c)
    eps = np.asarray(emissivity, dtype=float)
    eps_x = np.asarray(export_emissivity, dtype=float)
    l_surface = eps * _radiance_c(temp_module_c, band) + (1.0 - eps) * _radiance_c(temp_sky_c, band)
    if t_atm is None:
        l_sensor = l_surface
    else:
        l_sensor = tau * l_surface + (1.0 - tau) * _radiance_c(t_atm, band)
    with np.errstate(divide="ignore", invalid="ignore"):  # export eps = 0: no solution, NaN
        if np.any(eps_x != 1.0):
            l_app = (l_sensor - (1.0 - eps_x) * _radiance_c(export_reflected_c, band)) / eps_x
        else:
            l_app = l_sensor
        bad = ~((l_app > 0) & np.isfinite(l_app))
    l_app = np.where(bad, np.nan, l_app)
    return _scalar(_table(band).inverse(l_app) - _ZERO_C)


def effective_emissivity(emissivity: ArrayLike, view_angle_deg: ArrayLike = 0.0) -> FloatOrArray:
    r"""Emissivity of glass seen at an angle from its normal (Fresnel).

    The normal emissivity :math:`\varepsilon_0` defines an effective real refractive index
    :math:`n = (1 + \sqrt{R_0})/(1 - \sqrt{R_0})` with :math:`R_0 = 1 - \varepsilon_0`;
    the reflectance at incidence :math:`\theta` is the mean of the s and p Fresnel
    reflectances and :math:`\varepsilon(\theta) = 1 - R(\theta)`. The emissivity is nearly
    constant up to ~40 deg and falls steeply beyond ~60 deg (common practice: keep the view
    angle below about 60 deg, IEC TS 62446-3 recommends near-normal viewing, from memory).
    Real glass absorbs strongly in this band (complex index), so this is an approximation.

    Parameters
    ----------
    emissivity : array_like
        Normal emissivity [-].
    view_angle_deg : array_like
        Angle between the line of sight and the glass normal [deg].

    Returns
    -------
    numpy.ndarray or float
        Directional emissivity [-].

    References
    ----------
    .. [1] M. Born and E. Wolf, Principles of Optics, 7th ed., Cambridge University Press,
       1999, section 1.5 (Fresnel formulae).
    """
    eps0 = np.asarray(emissivity, dtype=float)
    th = np.radians(np.clip(np.asarray(view_angle_deg, dtype=float), 0.0, 90.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        r0 = np.sqrt(np.clip(1.0 - eps0, 0.0, 1.0))
        n = (1.0 + r0) / (1.0 - r0)
        cos_i = np.cos(th)
        sin_t = np.sin(th) / n
        cos_t = np.sqrt(1.0 - sin_t**2)
        rs = ((cos_i - n * cos_t) / (cos_i + n * cos_t)) ** 2
        rp = ((cos_t - n * cos_i) / (cos_t + n * cos_i)) ** 2
        eps = 1.0 - 0.5 * (rs + rp)
    eps = np.where(eps0 >= 1.0, 1.0, eps)
    return _scalar(eps)


# ---------------------------------------------------------------------------------------
# Statistics
# ---------------------------------------------------------------------------------------
_ORDER_KEYS = (
    "t_median_c",
    "t_p95_c",
    "t_p05_c",
    "t_max_c",
    "t_min_c",
    "cell_median",
    "cell_p95",
    "sub_median",
    "sub_p95",
)
_RADIOMETRIC_KEYS = (
    "emissivity",
    "temp_sky_c",
    "export_emissivity",
    "export_reflected_c",
    "transmission",
    "temp_atm_c",
    "band_um",
)


def correct_mean_std(mean_c: ArrayLike, std_k: ArrayLike, *, step_k: float = 0.25,
                     **radiometric: Any) -> tuple[FloatOrArray, FloatOrArray]:
    r"""Convert a mean and standard deviation of apparent temperature to true temperature.

    With :math:`f` the monotone map :func:`true_from_apparent`, the second-order (delta
    method) expansion around the mean :math:`m` with standard deviation :math:`s` is

    .. math:: \bar T = f(m) + \tfrac12 f''(m)\, s^2, \qquad \sigma_T = |f'(m)|\, s

    Derivatives by central differences with step ``step_k``.

    Parameters
    ----------
    mean_c : array_like
        Mean apparent temperature [degC].
    std_k : array_like
        Standard deviation of apparent temperature [K].
    step_k : float
        Finite-difference step [K].
    **radiometric
        Keywords of :func:`true_from_apparent`.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        True mean [degC] and true standard deviation [K].
    """
    m = np.asarray(mean_c, dtype=float)
    s = np.asarray(std_k, dtype=float)
    f0 = np.asarray(true_from_apparent(m, **radiometric))
    fp = np.asarray(true_from_apparent(m + step_k, **radiometric))
    fm = np.asarray(true_from_apparent(m - step_k, **radiometric))
    d1 = (fp - fm) / (2 * step_k)
    d2 = (fp - 2 * f0 + fm) / step_k**2
    return _scalar(f0 + 0.5 * d2 * s**2), _scalar(np.abs(d1) * s)


def _expand(value: ArrayLike, ndim: int) -> np.ndarray:
    a = np.asarray(value, dtype=float)
    if a.ndim == 1 and ndim > 1:
        return a.reshape(a.shape + (1,) * (ndim - 1))
    return a


def correct_statistics(
    stats: Stats,
    *,
    order_keys: Sequence[str] = _ORDER_KEYS,
    mean_key: str = "t_mean_c",
    std_key: str = "t_std_k",
    **radiometric: Any,
) -> Stats:
    """Convert apparent-temperature statistics to true glass temperature.

    Order statistics (median, percentiles, min, max, cell and substring medians) go through
    the monotone map :func:`true_from_apparent` exactly; the mean and standard deviation
    through :func:`correct_mean_std`. Per-module radiometric parameters (1-D arrays of
    length n) are broadcast along the trailing axes of ``(n, ...)`` arrays, so the same
    call converts a module table and ``(n, n_along, n_across)`` cell arrays.

    Parameters
    ----------
    stats : pandas.DataFrame or Mapping[str, array_like]
        Statistics with the modules along the first axis, e.g. ``ZonalStats.table``
        (``t_mean_c, t_median_c, t_p95_c, t_max_c, t_min_c, t_std_k``) or a mapping of
        arrays (``cell_median``, ``cell_p95``, ``sub_median``, ``sub_p95``).
    order_keys : sequence of str
        Keys converted exactly as order statistics [degC]; absent keys are skipped.
    mean_key, std_key : str
        Keys of the mean [degC] and standard deviation [K]; converted when both exist.
    **radiometric
        Keywords of :func:`true_from_apparent` (``emissivity``, ``temp_sky_c``, ...),
        scalars or per-module arrays.

    Returns
    -------
    same type as ``stats``
        A copy with converted values; other keys are passed through unchanged.
    """
    data: Any = stats
    unknown = set(radiometric) - set(_RADIOMETRIC_KEYS)
    if unknown:
        raise TypeError(f"correct_statistics: unexpected keyword {sorted(unknown)[0]!r}")
    is_frame = hasattr(data, "columns") and hasattr(data, "index")
    if is_frame:
        out = data.copy()
        keys = list(data.columns)
    elif isinstance(data, Mapping):
        out = dict(data)
        keys = list(data)
    else:
        raise TypeError("correct_statistics: stats must be a DataFrame or a mapping of arrays")

    def params_for(ndim: int) -> dict[str, Any]:
        return {
            k: (v if k == "band_um" or v is None else _expand(v, ndim)) for k, v in radiometric.items()
        }

    for key in order_keys:
        if key in keys:
            vals = np.asarray(data[key], dtype=float)
            out[key] = true_from_apparent(vals, **params_for(vals.ndim))
    if mean_key in keys and std_key in keys:
        m = np.asarray(data[mean_key], dtype=float)
        s = np.asarray(data[std_key], dtype=float)
        mt, st = correct_mean_std(m, s, **params_for(m.ndim))
        out[mean_key] = mt
        out[std_key] = st
    elif mean_key in keys:
        m = np.asarray(data[mean_key], dtype=float)
        out[mean_key] = true_from_apparent(m, **params_for(m.ndim))
    return out


def temperature_uncertainty(temp_apparent_c: ArrayLike, *, emissivity_sd: float = 0.02,
                            temp_sky_sd_k: float = 10.0, transmission_sd: float = 0.0,
                            **radiometric: Any) -> FloatOrArray:
    r"""Standard uncertainty of the true temperature from uncertain radiometric inputs.

    First-order propagation (GUM, JCGM 100:2008, law of propagation of uncertainty) for
    independent inputs: :math:`u_T^2 = \sum_i (\partial T / \partial x_i)^2 u_{x_i}^2`,
    partial derivatives by central differences of :func:`true_from_apparent`. The defaults,
    0.02 in emissivity and 10 K in sky temperature, are typical for glass and an estimated
    clear sky (common practice). Differences between neighbouring modules imaged under the
    same conditions are far less uncertain than absolute temperatures: these errors are
    common to both.

    Parameters
    ----------
    temp_apparent_c : array_like
        Apparent temperature [degC].
    emissivity_sd : float
        Standard uncertainty of the emissivity [-].
    temp_sky_sd_k : float
        Standard uncertainty of the sky temperature [K].
    transmission_sd : float
        Standard uncertainty of the transmission [-] (needs ``temp_atm_c``).
    **radiometric
        Keywords of :func:`true_from_apparent` (``emissivity`` and ``temp_sky_c`` required).

    Returns
    -------
    numpy.ndarray or float
        Standard uncertainty of the true temperature [K].

    References
    ----------
    .. [1] JCGM 100:2008, Evaluation of measurement data - Guide to the expression of
       uncertainty in measurement (GUM), section 5.1.
    """
    t = np.asarray(temp_apparent_c, dtype=float)
    var = np.zeros_like(np.asarray(true_from_apparent(t, **radiometric), dtype=float))
    steps = {"emissivity": (emissivity_sd, 1e-4), "temp_sky_c": (temp_sky_sd_k, 1e-2),
             "transmission": (transmission_sd, 1e-4)}
    for key, (sd, h) in steps.items():
        if sd == 0.0:
            continue
        base = np.asarray(radiometric.get(key, 1.0), dtype=float)
        hi = true_from_apparent(t, **{**radiometric, key: base + h})
        lo = true_from_apparent(t, **{**radiometric, key: base - h})
        var = var + ((np.asarray(hi) - np.asarray(lo)) / (2 * h) * sd) ** 2
    return _scalar(np.sqrt(var))


# ---------------------------------------------------------------------------------------
# Flight wrapper
# ---------------------------------------------------------------------------------------
#: Modules per call of the band transmission in :func:`flight_radiometry` (bounds its temporaries).
_TRANSMISSION_CHUNK = 8192


def flight_radiometry(flight: Flight, conditions: Any,
                      settings: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Radiometric keywords for :func:`true_from_apparent` / :func:`correct_statistics`.

    Parameters
    ----------
    flight : pvscan.io.manifest.Flight
        Uses ``flight.module.emissivity``, ``flight.ortho.emissivity`` and
        ``flight.ortho.reflected_c`` (the export's assumptions), ``flight.flight.altitude_m``
        (path length) and ``flight.layout.tilt_deg`` (view angle of a nadir camera).
    conditions : pandas.DataFrame
        Per-module conditions from :func:`pvscan.measure.conditions.module_conditions`
        (``temp_sky``, ``temp_air``, ``relative_humidity``).
    settings : Pipeline or Mapping, optional
        The pipeline or its ``[radiometry]`` section (keys not given keep the defaults of
        ``pipelines/post_flight.toml``).

    Returns
    -------
    dict
        ``emissivity``, ``temp_sky_c``, ``export_emissivity``, ``export_reflected_c``,
        ``transmission``, ``temp_atm_c``, ``band_um``; per-module values are 1-D arrays.
    """
    from pvscan.io.settings import section

    cfg = section(settings, "radiometry")
    band = tuple(float(b) for b in cfg["band_um"])
    emissivity = float(flight.module.emissivity)
    if cfg["view_angle_from_tilt"]:
        tilt = getattr(getattr(flight, "layout", None), "tilt_deg", None) or 0.0
        emissivity = float(effective_emissivity(emissivity, tilt))
    temp_air = np.asarray(conditions["temp_air"], dtype=float)
    rh_default = float(cfg["default_relative_humidity_pct"])
    if "relative_humidity" in getattr(conditions, "columns", conditions):
        rh = np.asarray(conditions["relative_humidity"], dtype=float)
        rh = np.where(np.isfinite(rh), rh, rh_default)
    else:
        rh = np.full(temp_air.shape, rh_default)
    kw: dict[str, Any] = {
        "emissivity": emissivity,
        "temp_sky_c": np.asarray(conditions["temp_sky"], dtype=float),
        "export_emissivity": float(flight.ortho.emissivity),
        "export_reflected_c": float(flight.ortho.reflected_c),
        "band_um": band,
    }
    if cfg["atmosphere"]:
        dist = getattr(flight.flight, "altitude_m", None)
        if dist is None:
            dist = float(cfg["default_altitude_m"])
        pressure = float(cfg["pressure_hpa"])
        if temp_air.ndim == 1:
            # in chunks of modules: the band integral holds (modules x wavenumbers)
            # temporaries, and each module's value depends on its own conditions only
            kw["transmission"] = np.concatenate([
                np.atleast_1d(np.asarray(atmospheric_transmission(
                    dist, temp_air[i:i + _TRANSMISSION_CHUNK], rh[i:i + _TRANSMISSION_CHUNK],
                    pressure_hpa=pressure, band_um=band)))
                for i in range(0, max(temp_air.size, 1), _TRANSMISSION_CHUNK)])
        else:
            kw["transmission"] = np.asarray(atmospheric_transmission(dist, temp_air, rh, pressure_hpa=pressure,
                                                                     band_um=band))
        kw["temp_atm_c"] = temp_air
    return kw
