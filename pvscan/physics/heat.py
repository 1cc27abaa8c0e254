"""The module heat balance: the Faiman model, once for every stage.

A PV module in the sun runs above the air temperature by the absorbed irradiance it has to
shed, divided by a heat-loss coefficient that grows with the wind (Faiman 2008):

    ``T_module = T_air + G / U(v)``,  ``U(v) = u0 + u1 * v``

Everything pvscan derives from that balance lives here:

* :func:`faiman_u`, :func:`faiman_temperature`: the model itself (pvlib's
  ``pvlib.temperature.faiman`` is the reference implementation the tests compare with);
* :func:`open_module_rise`: a module (or substring) that delivers no power turns the share
  ``eta`` of the irradiance it would have exported into heat, so it runs ``eta * G / U(v)``
  warmer than producing modules beside it;
* :func:`normalise_delta_t`: a temperature difference driven by absorbed power, scaled to
  reference irradiance and wind, ``dT * (G_ref / G) * (U(v) / U(v_ref))``.

The coefficients come from the pipeline settings (``[heat] u0, u1``); :class:`Faiman` holds
them (``Faiman.from_settings(pipeline)``) so a stage never writes its own copy of the
numbers. Wind speeds below zero are read as calm (0 m/s), the one clip every copy of the
model must share.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [2] W. F. Holmgren, C. W. Hansen and M. A. Mikofski, "pvlib python: a python package for
   modeling solar energy systems", Journal of Open Source Software 3(29), 884, 2018.
   doi:10.21105/joss.00884 (``pvlib.temperature.faiman``)
"""
from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from pvscan.physics._arrays import FloatOrArray, as_output

__all__ = [
    "Faiman",
    "faiman_u",
    "faiman_temperature",
    "open_module_rise",
    "normalise_delta_t",
    "U0_FAIMAN_2008",
    "U1_FAIMAN_2008",
]

#: The coefficients Faiman fitted in [1] (also pvlib's defaults) [W/(m2 K)], [W s/(m3 K)].
#: A published model's constants, for callers that have no pipeline; the pipeline's
#: ``[heat]`` section is where a run takes its coefficients from.
U0_FAIMAN_2008 = 25.0
U1_FAIMAN_2008 = 6.84



def _wind(wind_speed: ArrayLike) -> np.ndarray:
    """Wind speed with negative values read as calm [m/s]."""
    return np.clip(np.asarray(wind_speed, dtype=float), 0.0, None)


def faiman_u(wind_speed: ArrayLike, u0: float, u1: float) -> FloatOrArray:
    """Faiman combined heat-loss coefficient ``U = u0 + u1 * v``.

    Parameters
    ----------
    wind_speed : float or array-like
        Wind speed. Negative values are read as calm (0 m/s). [m/s]
    u0 : float
        Constant heat-loss coefficient. [W/(m2 K)]
    u1 : float
        Wind-dependent heat-loss coefficient. [W s/(m3 K)]

    Returns
    -------
    float or numpy.ndarray
        ``U`` such that the module runs ``poa_global / U`` above the air. [W/(m2 K)]

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    return as_output(float(u0) + float(u1) * _wind(wind_speed))


def faiman_temperature(poa_global: ArrayLike, temp_air: ArrayLike, wind_speed: ArrayLike,
                       u0: float, u1: float) -> FloatOrArray:
    """Faiman module temperature ``temp_air + poa_global / U(v)``.

    Parameters
    ----------
    poa_global : float or array-like
        Plane-of-array irradiance. [W/m2]
    temp_air : float or array-like
        Air temperature. [degC]
    wind_speed : float or array-like
        Wind speed (negative: calm). [m/s]
    u0, u1 : float
        Faiman coefficients. [W/(m2 K)], [W s/(m3 K)]

    Returns
    -------
    float or numpy.ndarray
        Module temperature. [degC]

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    g = np.asarray(poa_global, dtype=float)
    return as_output(np.asarray(temp_air, dtype=float) + g / np.asarray(faiman_u(wind_speed, u0, u1)))


def open_module_rise(efficiency: ArrayLike, poa_global: ArrayLike, wind_speed: ArrayLike,
                     u0: float, u1: float) -> FloatOrArray:
    """Rise of a module (or substring) delivering no power over producing ones, ``eta * G / U(v)``.

    A producing module exports the share ``eta`` of the irradiance as electricity; an
    open-circuited module, or a substring whose bypass diode conducts, turns it into heat
    instead, so the Faiman balance puts it ``eta * G / U(v)`` above its producing
    neighbours. Lateral conduction into cooler cells makes a narrow strip run somewhat below
    this.

    Parameters
    ----------
    efficiency : float or array-like
        Conversion efficiency at the operating point (at STC: ``pmax / (1000 W/m2 * area)``). [-]
    poa_global : float or array-like
        Plane-of-array irradiance. [W/m2]
    wind_speed : float or array-like
        Wind speed (negative: calm). [m/s]
    u0, u1 : float
        Faiman coefficients. [W/(m2 K)], [W s/(m3 K)]

    Returns
    -------
    float or numpy.ndarray
        The rise; NaN where the irradiance is not positive. [K]

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    eta = np.asarray(efficiency, dtype=float)
    g = np.asarray(poa_global, dtype=float)
    with np.errstate(invalid="ignore"):
        rise = np.where(g > 0, eta * g / np.asarray(faiman_u(wind_speed, u0, u1)), np.nan)
    return as_output(rise)


def normalise_delta_t(delta_t_k: ArrayLike, poa_global: ArrayLike, wind_speed: ArrayLike, *,
                      g_ref: float, wind_ref: float, u0: float, u1: float) -> FloatOrArray:
    """Scale a temperature difference to reference irradiance and wind (Faiman).

    A difference driven by absorbed power grows with the irradiance and shrinks with the
    heat-loss coefficient, so ``dT_norm = dT * (g_ref / G) * (U(v) / U(wind_ref))``.

    Parameters
    ----------
    delta_t_k : float or array-like
        Measured temperature difference. [K]
    poa_global : float or array-like
        Plane-of-array irradiance when the module was imaged. [W/m2]
    wind_speed : float or array-like
        Wind speed when the module was imaged (negative: calm). [m/s]
    g_ref : float
        Reference irradiance. [W/m2]
    wind_ref : float
        Reference wind speed. [m/s]
    u0, u1 : float
        Faiman coefficients. [W/(m2 K)], [W s/(m3 K)]

    Returns
    -------
    float or numpy.ndarray
        Normalised difference; NaN where ``poa_global`` is not positive or NaN. [K]
    """
    dt = np.asarray(delta_t_k, dtype=float)
    g = np.asarray(poa_global, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(g > 0, float(g_ref) / np.where(g > 0, g, 1.0), np.nan)
        out = dt * scale * (np.asarray(faiman_u(wind_speed, u0, u1)) / float(faiman_u(wind_ref, u0, u1)))
    return as_output(out)


@dataclass(frozen=True)
class Faiman:
    """The Faiman coefficients of a run, with the model's functions bound to them.

    Attributes
    ----------
    u0 : float
        Constant heat-loss coefficient. [W/(m2 K)]
    u1 : float
        Wind-dependent heat-loss coefficient. [W s/(m3 K)]
    """

    u0: float
    u1: float

    @classmethod
    def from_settings(cls, settings: Mapping[str, Any]) -> Faiman:
        """The coefficients of a pipeline (its ``[heat]`` section) or of a section mapping."""
        sec: Mapping[str, Any] = settings
        if "heat" in settings:
            sec = settings["heat"]
        return cls(float(sec["u0"]), float(sec["u1"]))

    def u(self, wind_speed: ArrayLike) -> FloatOrArray:
        """Heat-loss coefficient at ``wind_speed`` [m/s]. [W/(m2 K)]"""
        return faiman_u(wind_speed, self.u0, self.u1)

    def temperature(self, poa_global: ArrayLike, temp_air: ArrayLike, wind_speed: ArrayLike) -> FloatOrArray:
        """Module temperature, see :func:`faiman_temperature`. [degC]"""
        return faiman_temperature(poa_global, temp_air, wind_speed, self.u0, self.u1)

    def open_module_rise(self, efficiency: ArrayLike, poa_global: ArrayLike, wind_speed: ArrayLike) -> FloatOrArray:
        """Rise of a module delivering no power, see :func:`open_module_rise`. [K]"""
        return open_module_rise(efficiency, poa_global, wind_speed, self.u0, self.u1)

    def normalise(self, delta_t_k: ArrayLike, poa_global: ArrayLike, wind_speed: ArrayLike, *,
                  g_ref: float, wind_ref: float) -> FloatOrArray:
        """Difference at reference conditions, see :func:`normalise_delta_t`. [K]"""
        return normalise_delta_t(delta_t_k, poa_global, wind_speed, g_ref=g_ref, wind_ref=wind_ref,
                                 u0=self.u0, u1=self.u1)

    def to_dict(self) -> dict[str, float]:
        return {"u0": self.u0, "u1": self.u1}
