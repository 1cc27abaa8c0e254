"""Serpentine flight path, camera frames and the weather along the flight.

The drone flies straight lines over the field (along the table rows, or east-west),
alternating direction, one frame every
``along * (1 - front_overlap)`` metres, lines ``across * (1 - side_overlap)`` apart, at
``speed_m_s`` with ``turn_s`` seconds per turn. A module is *imaged* at the time of the
frame whose centre is nearest to the module's centroid (the frame that sees it most
squarely, which is the one a mosaic keeps); its conditions are the weather of that moment.
"""
from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from pvscan._typing import FloatArray

__all__ = ["FlightPlan", "plan_flight", "WeatherSeries", "weather_series"]


@dataclass
class FlightPlan:
    """Camera frames of a flight.

    Attributes
    ----------
    corners : ndarray (n, 4, 2)
        Frame footprints (four corners, counter-clockwise) in the projected CRS [m].
    times_s : ndarray (n,)
        Seconds since the start of the flight [s].
    duration_s : float
        Time of the last frame [s].
    headings : ndarray (n, 2)
        Unit vector (east, north) of the drone's travel when each frame was taken.
    """

    corners: FloatArray
    times_s: FloatArray
    duration_s: float
    headings: FloatArray

    @property
    def centres(self) -> FloatArray:
        return self.corners.mean(axis=1)

    def imaged_at(self, x: ArrayLike, y: ArrayLike) -> FloatArray:
        """Time each point is imaged: that of the frame whose centre is nearest [s]."""
        from scipy.spatial import cKDTree

        _, k = cKDTree(self.centres).query(np.stack([np.ravel(x), np.ravel(y)], axis=1))
        return self.times_s[k].reshape(np.shape(x))


def plan_flight(fl: Mapping[str, Any], extent: Sequence[float], gsd: float,
                heading: Sequence[float] = (1.0, 0.0)) -> FlightPlan:
    """Plan serpentine lines covering ``extent`` = (xmin, ymin, xmax, ymax) [m].

    Parameters
    ----------
    fl : dict
        The scenario's ``[flight]`` table.
    gsd : float
        Ground sampling distance of the frames [m/px].
    heading : (float, float)
        Unit vector (east, north) of the flight lines; frames are aligned with it.
    """
    h = np.asarray(heading, float)
    h = h / np.hypot(*h)
    q_axis = np.array([-h[1], h[0]])                 # across the lines (to the left)
    xmin, ymin, xmax, ymax = extent
    box = np.array([[xmin, ymin], [xmax, ymin], [xmax, ymax], [xmin, ymax]])
    p_c, q_c = box @ h, box @ q_axis
    pmin, pmax, qmin, qmax = p_c.min(), p_c.max(), q_c.min(), q_c.max()
    across = fl["frame_px"][0] * gsd      # frame width across the track [m]
    along = fl["frame_px"][1] * gsd       # frame height along the track [m]
    step_along = max(along * (1.0 - fl["front_overlap"]), gsd)
    step_lines = max(across * (1.0 - fl["side_overlap"]), gsd)
    n_lines = max(1, math.ceil(max(qmax - qmin - across, 0.0) / step_lines) + 1)
    n_frames = max(1, math.ceil(max(pmax - pmin - along, 0.0) / step_along) + 1)
    ps = pmin + along / 2 + np.arange(n_frames) * step_along
    local = np.array([[-along / 2, -across / 2], [along / 2, -across / 2], [along / 2, across / 2],
                      [-along / 2, across / 2]])
    corners, times, travel = [], [], []
    t = 0.0
    for k in range(n_lines):
        qc = qmax - across / 2 - k * step_lines
        order = ps if k % 2 == 0 else ps[::-1]
        for j, pc in enumerate(order):
            if j:
                t += step_along / fl["speed_m_s"]
            pq = local + np.array([pc, qc])
            corners.append(pq[:, :1] * h + pq[:, 1:] * q_axis)
            times.append(t)
            travel.append(h if k % 2 == 0 else -h)
        t += fl["turn_s"] + step_lines / fl["speed_m_s"]
    times_arr = np.asarray(times)
    return FlightPlan(np.asarray(corners), times_arr, float(times_arr.max()), np.asarray(travel))


@dataclass
class WeatherSeries:
    """Weather sampled along the flight (what a logger would write).

    Attributes
    ----------
    times_s : ndarray
        Seconds since the start [s].
    poa_global : ndarray
        Plane-of-array irradiance [W/m2].
    temp_air : ndarray
        Air temperature [degC].
    wind_speed : ndarray
        Wind speed [m/s].
    varying : bool
        False for constant conditions.
    poa_thermal : ndarray
        The irradiance the module temperature is in balance with at each time [W/m2]: equal
        to ``poa_global`` for constant conditions; for varying conditions the module's
        thermal inertia smooths fast changes (see :func:`weather_series`).
    """

    times_s: FloatArray
    poa_global: FloatArray
    temp_air: FloatArray
    wind_speed: FloatArray
    varying: bool
    poa_thermal: FloatArray | None = None

    def at(self, t_s: ArrayLike) -> tuple[FloatArray, FloatArray, FloatArray]:
        """(poa_global, temp_air, wind_speed) at times ``t_s``, linearly interpolated."""
        t = np.asarray(t_s, float)
        return (np.interp(t, self.times_s, self.poa_global), np.interp(t, self.times_s, self.temp_air),
                np.interp(t, self.times_s, self.wind_speed))

    def poa_thermal_at(self, t_s: ArrayLike) -> FloatArray:
        """Irradiance the module temperature is in balance with at times ``t_s`` [W/m2]."""
        pt = self.poa_global if self.poa_thermal is None else self.poa_thermal
        return np.interp(np.asarray(t_s, float), self.times_s, pt)


def weather_series(cond: Mapping[str, Any], duration_s: float, rng: np.random.Generator,
                   start: datetime | None = None) -> WeatherSeries:
    """Conditions during the flight: constants, or drift plus irradiance dips and gusts.

    Irradiance dips (thin passing clouds) are Gaussian in time, 20-60 s wide; the gusts are
    a sum of three sinusoids with random phases. Values are rounded as a logger would
    write them (0.1 W/m2, 0.01 degC, 0.01 m/s) and the truth uses the rounded series.

    The module temperature does not follow fast changes: the steady-state Faiman
    temperature of the series (from 20 minutes before the start, drift continued
    backwards) is smoothed by the transient weighted moving average of Prilliman et al.
    [1]_ (``pvlib.temperature.prilliman``, default module mass 11.1 kg/m2), and expressed
    as the irradiance that would hold the module at that temperature in steady state,
    ``poa_thermal = (T_smoothed - T_air) * U(v)``.

    References
    ----------
    .. [1] M. Prilliman, J. S. Stein, D. Riley and G. Tamizhmani, "Transient weighted
       moving-average model of photovoltaic module back-surface temperature", IEEE Journal
       of Photovoltaics 10(4), 1053-1060, 2020. doi:10.1109/JPHOTOV.2020.2992351
    """
    g0, ta0, v0 = cond["poa_irradiance_w_m2"], cond["ambient_c"], cond["wind_m_s"]
    if not cond["varying"]:
        t = np.array([0.0, max(duration_s, 1.0)])
        g = np.full(2, float(g0))
        return WeatherSeries(t, g, np.full(2, float(ta0)), np.full(2, float(v0)), False, g)
    step = cond["series_step_s"]
    pre = int(np.ceil(1200.0 / step))
    t = np.arange(-pre, int(np.ceil((duration_s + 2 * step) / step))) * step
    minutes = t / 60.0
    g = g0 + cond["poa_drift_w_m2_per_min"] * minutes
    for _ in range(int(cond["irradiance_dips"])):
        tc = rng.uniform(0.15, 0.85) * max(duration_s, 1.0)
        wd = rng.uniform(20.0, 60.0)
        g = g - cond["irradiance_dip_depth"] * g0 * np.exp(-(((t - tc) / wd) ** 2))
    ta = ta0 + cond["ambient_drift_c_per_min"] * minutes
    v = v0 + cond["wind_drift_m_s_per_min"] * minutes
    for _ in range(3):
        period = rng.uniform(30.0, 120.0)
        v = v + cond["wind_gust_m_s"] / 3.0 * np.sin(2 * np.pi * t / period + rng.uniform(0, 2 * np.pi))
    g = np.round(np.maximum(g, 0.0), 1)
    ta = np.round(ta, 2)
    v = np.round(np.maximum(v, 0.0), 2)
    u = cond["u0"] + cond["u1"] * v
    g_th = _thermal_irradiance(t, g, ta, v, u, step)
    keep = t >= 0
    return WeatherSeries(t[keep], g[keep], ta[keep], v[keep], True, g_th[keep])


def _thermal_irradiance(t: FloatArray, g: FloatArray, ta: FloatArray, v: FloatArray, u: FloatArray,
                        step: float) -> FloatArray:
    import pandas as pd
    import pvlib

    idx = pd.date_range("2000-01-01", periods=t.size, freq=pd.Timedelta(seconds=float(step)))
    t_ss = pd.Series(ta + g / u, index=idx)
    with warnings.catch_warnings():
        # pvlib infers the sampling interval through a pandas API that warns about its future
        warnings.filterwarnings("ignore", message=".*inferred_freq.*")
        t_sm = pvlib.temperature.prilliman(t_ss, pd.Series(v, index=idx)).to_numpy(float)
    return (t_sm - ta) * u
