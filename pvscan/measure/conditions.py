"""Acquisition conditions: weather during the flight, per module, and their validity.

Three sources, in this order of preference for each quantity:

1. a weather series (CSV, :func:`read_weather_series`), interpolated linearly in time;
2. the constants of the manifest's ``[conditions]`` table;
3. a model, for the sky temperature only (:func:`pvscan.physics.radiometry.sky_temperature`).

With camera frame footprints (:func:`read_frames`) each module takes the time of the frame
that imaged it best (the frame containing the module centre whose own centre is closest
to it, i.e. the most nadir view, which is the one an orthomosaic keeps) and the weather of
that moment; without frames every module takes the flight's mean.

:func:`check_validity` compares the flight with the outdoor-thermography acquisition
conditions of IEC TS 62446-3 (minimum irradiance in the module plane, maximum wind,
stable irradiance, few clouds) and with the ground sampling distance needed to resolve
cells. Each limit lives in the ``[conditions]`` section of the pipeline with its source.

References
----------
.. [1] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any, TypeAlias

import numpy as np
import pandas as pd

from pvscan.errors import ConditionsError
from pvscan.io.settings import section
from pvscan.io.times import parse_datetime
from pvscan.measure.validity import Validity, check_validity
from pvscan.measure.weather import WEATHER_COLUMNS, read_frames, read_weather_series
from pvscan.physics import radiometry

if TYPE_CHECKING:
    import geopandas as gpd

    from pvscan.io.manifest import ConditionsSpec, Flight

__all__ = [
    "WEATHER_COLUMNS",
    "FlightConditions",
    "Validity",
    "read_weather_series",
    "read_frames",
    "flight_conditions",
    "module_conditions",
    "check_validity",
    "assign_frames",
    "conditions_for_flight",
]

logger = logging.getLogger(__name__)


#: The manifest's ``[conditions]``: a :class:`~pvscan.io.manifest.ConditionsSpec` or a mapping of its keys.
Spec: TypeAlias = "ConditionsSpec | Mapping[str, Any] | None"
#: A time as given: aware datetime, pandas Timestamp or ISO 8601 text with a UTC offset.
TimeLike: TypeAlias = "datetime | pd.Timestamp | str"


def _settings(settings: Mapping[str, Any] | None) -> Mapping[str, Any]:
    """The ``[conditions]`` section over the pipeline file's defaults."""
    return section(settings, "conditions")


def _spec_get(spec: Spec, key: str) -> Any:
    if spec is None:
        return None
    if isinstance(spec, Mapping):
        return spec.get(key)
    return getattr(spec, key, None)


# ---------------------------------------------------------------------------------------
# ---------------------------------------------------------------------------------------
# Flight conditions
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class FlightConditions:
    """Conditions during a flight (time span, means and spread).

    Attributes
    ----------
    start, end : datetime
        Flight time span (tz-aware, UTC).
    duration_s : float
        [s].
    poa_global, poa_global_min, poa_global_max, poa_global_std : float
        Time-weighted mean, minimum, maximum and standard deviation of the plane-of-array
        irradiance during the flight [W/m2].
    temp_air : float
        Mean air temperature [degC].
    wind_speed, wind_speed_max : float
        Mean and maximum wind speed [m/s].
    temp_sky : float
        Mean apparent sky temperature in the camera band [degC].
    relative_humidity : float or None
        Mean relative humidity [%].
    cloud_okta : float or None
        Maximum cloud cover during the flight [okta], when the series has it.
    source : str
        ``"series"`` or ``"constants"``.
    sky_source : str
        ``"series"``, ``"constants"`` or ``"model"``.
    n_samples : int
        Series samples inside the flight (0 for constants).
    """

    start: datetime
    end: datetime
    duration_s: float
    poa_global: float
    poa_global_min: float
    poa_global_max: float
    poa_global_std: float
    temp_air: float
    wind_speed: float
    wind_speed_max: float
    temp_sky: float
    relative_humidity: float | None = None
    cloud_okta: float | None = None
    source: str = "constants"
    sky_source: str = "model"
    n_samples: int = 0

    @property
    def poa_global_change_pct(self) -> float:
        """Largest change of irradiance during the flight, (max - min) / mean [%]."""
        if not self.poa_global > 0:
            return float("nan")
        return 100.0 * (self.poa_global_max - self.poa_global_min) / self.poa_global

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping (times as ISO 8601 strings)."""
        d = asdict(self)
        d["start"] = self.start.isoformat()
        d["end"] = self.end.isoformat()
        d["poa_global_change_pct"] = self.poa_global_change_pct
        return {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in d.items()}


def _as_utc(t: TimeLike, name: str) -> datetime:
    if not isinstance(t, (str, datetime)):
        raise ConditionsError(f"{name}: expected a datetime, got {type(t).__name__}")
    return parse_datetime(t, name, ConditionsError).astimezone(UTC)


def _epoch_s(times: pd.DatetimeIndex | pd.Series) -> np.ndarray:
    idx = pd.DatetimeIndex(times)
    if idx.tz is None:
        raise ConditionsError("times must be tz-aware")
    return (idx.tz_convert("UTC").as_unit("ns").asi8 / 1e9).astype(float)


def _interp(series: pd.DataFrame, col: str, t_s: np.ndarray) -> np.ndarray:
    """Linear interpolation of one column at epoch seconds (gaps skipped, ends held)."""
    x = _epoch_s(series.index)
    y = series[col].to_numpy(dtype=float)
    ok = np.isfinite(y)
    return np.interp(t_s, x[ok], y[ok])


def _window_stats(series: pd.DataFrame, col: str, t0: float, t1: float) -> tuple[float, float, float, float, int]:
    """Time-weighted mean, min, max, std of a column over [t0, t1] [epoch s]."""
    x = _epoch_s(series.index)
    y = series[col].to_numpy(dtype=float)
    ok = np.isfinite(y)
    inner = x[ok][(x[ok] > t0) & (x[ok] < t1)]
    pts = np.concatenate([[t0], inner, [t1]])
    vals = np.interp(pts, x[ok], y[ok])
    if t1 > t0:
        mean = float(np.sum(0.5 * (vals[1:] + vals[:-1]) * np.diff(pts)) / (t1 - t0))
    else:
        mean = float(vals[0])
    return mean, float(vals.min()), float(vals.max()), float(vals.std()), int(inner.size)


def _check_coverage(series: pd.DataFrame, start: datetime, end: datetime, tol_s: float) -> None:
    src = series.attrs.get("source", "weather series")
    if len(series) == 0:
        raise ConditionsError(f"{src}: no data rows")
    first, last = series.index[0], series.index[-1]
    if first > start + timedelta(seconds=tol_s) or last < end - timedelta(seconds=tol_s):
        raise ConditionsError(
            f"{src}: series covers {first.isoformat()}..{last.isoformat()}, the flight is "
            f"{start.isoformat()}..{end.isoformat()} (tolerance {tol_s:g} s)")


def _resolve_series(spec: Spec, series: pd.DataFrame | None) -> pd.DataFrame | None:
    if series is None:
        p = _spec_get(spec, "series")
        if p is not None:
            series = read_weather_series(p)
    if series is not None:
        if not isinstance(series.index, pd.DatetimeIndex) or series.index.tz is None:
            raise ConditionsError(f"{series.attrs.get('source', 'weather series')}: index must be tz-aware times")
        missing = [c for c, (_, req, _, _) in WEATHER_COLUMNS.items() if req and c not in series.columns]
        if missing:
            raise ConditionsError(f"{series.attrs.get('source', 'weather series')}: missing column {missing[0]!r}")
        if not series.index.is_monotonic_increasing:
            series = series.sort_index()
    return series


def _constant(spec: Spec, key: str, required: bool) -> float | None:
    v = _spec_get(spec, key)
    if v is None:
        if required:
            raise ConditionsError(f"conditions.{key}: missing (give the constant or conditions.series)")
        return None
    return float(v)


def flight_conditions(spec: Spec, start: TimeLike, end: TimeLike, series: pd.DataFrame | None = None, *,
                      settings: Mapping[str, Any] | None = None) -> FlightConditions:
    """Conditions during the flight: from a weather series, or constants.

    Parameters
    ----------
    spec : pvscan.io.manifest.ConditionsSpec or Mapping
        Constants ``poa_irradiance_w_m2`` [W/m2], ``ambient_c`` [degC], ``wind_m_s``
        [m/s], optional ``sky_c`` [degC], ``relative_humidity_pct`` [%], ``series`` (path,
        read when ``series`` is not given).
    start, end : datetime
        Flight time span (tz-aware).
    series : pandas.DataFrame, optional
        From :func:`read_weather_series`. Its columns win over the constants.
    settings : Mapping, optional
        The pipeline or its ``[conditions]`` section (``series_tolerance_s``, ``sky_band``);
        keys not given keep the pipeline file's defaults.

    Returns
    -------
    FlightConditions

    Raises
    ------
    ConditionsError
        Times without offset, end before start, a series that does not cover the flight
        (beyond ``series_tolerance_s``), or a missing constant without a series.
    """
    st = _settings(settings)
    t_start = _as_utc(start, "flight.start")
    t_end = _as_utc(end, "flight.end")
    if t_end < t_start:
        raise ConditionsError(f"flight.end {t_end.isoformat()} is before flight.start {t_start.isoformat()}")
    series = _resolve_series(spec, series)
    t0, t1 = t_start.timestamp(), t_end.timestamp()
    vals: dict[str, Any] = {}
    n_samples = 0
    if series is not None:
        _check_coverage(series, t_start, t_end, float(st["series_tolerance_s"]))
        g = _window_stats(series, "poa_irradiance_w_m2", t0, t1)
        vals.update(poa_global=g[0], poa_global_min=g[1], poa_global_max=g[2], poa_global_std=g[3])
        n_samples = g[4]
        vals["temp_air"] = _window_stats(series, "ambient_c", t0, t1)[0]
        w = _window_stats(series, "wind_m_s", t0, t1)
        vals["wind_speed"], vals["wind_speed_max"] = w[0], w[2]
        for col, name in (("relative_humidity_pct", "relative_humidity"), ("sky_c", "temp_sky")):
            if col in series.columns:
                vals[name] = _window_stats(series, col, t0, t1)[0]
        if "cloud_okta" in series.columns:
            vals["cloud_okta"] = _window_stats(series, "cloud_okta", t0, t1)[2]
        source = "series"
    else:
        poa = _constant(spec, "poa_irradiance_w_m2", True)
        vals.update(poa_global=poa, poa_global_min=poa, poa_global_max=poa, poa_global_std=0.0)
        vals["temp_air"] = _constant(spec, "ambient_c", True)
        vals["wind_speed"] = vals["wind_speed_max"] = _constant(spec, "wind_m_s", True)
        source = "constants"
    if "relative_humidity" not in vals:
        vals["relative_humidity"] = _constant(spec, "relative_humidity_pct", False)
    if "temp_sky" in vals:
        sky_source = "series"
    elif _spec_get(spec, "sky_c") is not None:
        vals["temp_sky"], sky_source = float(_spec_get(spec, "sky_c")), "constants"
    else:
        vals["temp_sky"] = float(radiometry.sky_temperature(
            vals["temp_air"], vals["relative_humidity"], band=st["sky_band"]))
        sky_source = "model"
    return FlightConditions(start=t_start, end=t_end, duration_s=t1 - t0, source=source, sky_source=sky_source,
                            n_samples=n_samples, **vals)


# ---------------------------------------------------------------------------------------
# Per-module conditions
# ---------------------------------------------------------------------------------------
def _module_centres(modules: gpd.GeoDataFrame) -> tuple[np.ndarray, np.ndarray]:
    cols = ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")
    if all(c in modules.columns for c in cols):
        x = modules["fx0"].to_numpy(float) + 0.5 * (modules["fux"].to_numpy(float) + modules["fvx"].to_numpy(float))
        y = modules["fy0"].to_numpy(float) + 0.5 * (modules["fuy"].to_numpy(float) + modules["fvy"].to_numpy(float))
        return x, y
    c = modules.geometry.centroid
    return c.x.to_numpy(float), c.y.to_numpy(float)


def assign_frames(modules: gpd.GeoDataFrame, frames: gpd.GeoDataFrame) -> pd.DataFrame:
    """The frame that imaged each module best.

    The best frame contains the module centre and has its own centre closest to it (the
    most nadir view). A module outside every frame takes the frame nearest to its centre
    (``time_source = "nearest_frame"``, logged).

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        Modules (module-local frame columns, or footprints), same CRS as ``frames``.
    frames : geopandas.GeoDataFrame
        From :func:`read_frames`.

    Returns
    -------
    pandas.DataFrame
        Aligned with the modules: ``frame`` (row of ``frames``), ``frame_id``, ``time``,
        ``time_source`` (``"frame"`` or ``"nearest_frame"``).
    """
    import shapely

    mx, my = _module_centres(modules)
    n = len(mx)
    points = shapely.points(mx, my)
    geoms = np.asarray(frames.geometry.values)
    tree = shapely.STRtree(geoms)
    pi, fi = tree.query(points, predicate="within")
    cx = frames["cx"].to_numpy(float) if "cx" in frames.columns else frames.geometry.centroid.x.to_numpy(float)
    cy = frames["cy"].to_numpy(float) if "cy" in frames.columns else frames.geometry.centroid.y.to_numpy(float)
    best = np.full(n, -1, dtype=np.intp)
    if pi.size:
        d2 = (cx[fi] - mx[pi]) ** 2 + (cy[fi] - my[pi]) ** 2
        order = np.lexsort((fi, d2, pi))  # by module, then distance, then frame row (ties)
        pi_s, fi_s = pi[order], fi[order]
        first = np.r_[True, pi_s[1:] != pi_s[:-1]]
        best[pi_s[first]] = fi_s[first]
    source = np.where(best >= 0, "frame", "nearest_frame").astype(object)
    lost = np.flatnonzero(best < 0)
    if lost.size:
        near = tree.query_nearest(points[lost], return_distance=False)
        # query_nearest returns (input, tree) pairs; keep the first per input
        inp, tr = near
        keep = np.r_[True, inp[1:] != inp[:-1]]
        best[lost[inp[keep]]] = tr[keep]
        logger.warning("%d of %d modules lie outside every camera frame; they take the nearest frame's time",
                       lost.size, n)
    times = pd.DatetimeIndex(frames["time"]).tz_convert("UTC")[best]
    return pd.DataFrame({"frame": best, "frame_id": frames["frame_id"].to_numpy()[best] if "frame_id" in frames
                         else best.astype(str), "time": times, "time_source": source}, index=modules.index)


def module_conditions(modules: gpd.GeoDataFrame, spec: Spec, start: TimeLike, end: TimeLike,
                      series: pd.DataFrame | None = None, frames: gpd.GeoDataFrame | None = None,
                      settings: Mapping[str, Any] | None = None, *, tilt_deg: float | None = None) -> pd.DataFrame:
    """Conditions of the moment each module was imaged.

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        Modules from :func:`pvscan.io.layout.read_layout` (module-local frame columns
        ``fx0 .. fvy``, else the footprint centroids are used).
    spec : pvscan.io.manifest.ConditionsSpec or Mapping
        Manifest constants (see :func:`flight_conditions`).
    start, end : datetime
        Flight time span (tz-aware).
    series : pandas.DataFrame, optional
        Weather series (:func:`read_weather_series`); read from ``spec.series`` when None.
    frames : geopandas.GeoDataFrame, optional
        Camera frames (:func:`read_frames`) in the modules' CRS.
    settings : Mapping, optional
        The ``[conditions]`` pipeline section.
    tilt_deg : float, optional
        Module tilt [deg]. With ``sky_view = "specular"`` in the settings, a modelled sky
        is taken along the mirror direction of a nadir view, at zenith ``2 * tilt_deg``
        (:func:`pvscan.physics.radiometry.sky_temperature` with ``zenith_deg``).

    Returns
    -------
    pandas.DataFrame
        Aligned with ``modules``: ``time`` (UTC), ``poa_global`` [W/m2], ``temp_air``
        [degC], ``wind_speed`` [m/s], ``temp_sky`` [degC], ``relative_humidity`` [%] (NaN
        when unknown), ``time_source`` (``"frame"``, ``"nearest_frame"`` or
        ``"flight_mean"``), ``frame_id`` (None without frames).

    Notes
    -----
    With frames and a series, values are interpolated at the frame times; with frames and
    constants, only the time differs between modules; without frames every module takes
    the flight's time-weighted mean at the flight's mid time.
    """
    st = _settings(settings)
    series = _resolve_series(spec, series)
    fc = flight_conditions(spec, start, end, series, settings=st)
    n = len(modules)
    index = modules.index
    mid = fc.start + (fc.end - fc.start) / 2
    means = {
        "poa_global": fc.poa_global,
        "temp_air": fc.temp_air,
        "wind_speed": fc.wind_speed,
        "relative_humidity": np.nan if fc.relative_humidity is None else fc.relative_humidity,
    }
    out = pd.DataFrame(index=index)
    if frames is not None and n:
        fr = assign_frames(modules, frames)
        times = pd.DatetimeIndex(fr["time"])
        out["time"] = times
        out["time_source"] = fr["time_source"].to_numpy()
        out["frame_id"] = fr["frame_id"].to_numpy()
        if series is not None:
            t_s = _epoch_s(times)
            for col, (name, _, _, _) in WEATHER_COLUMNS.items():
                if col in series.columns and name != "cloud_okta":
                    out[name] = _interp(series, col, t_s)
    else:
        out["time"] = pd.DatetimeIndex([pd.Timestamp(mid)] * n, tz="UTC") if n else pd.DatetimeIndex([], tz="UTC")
        out["time_source"] = "flight_mean"
        out["frame_id"] = None
    for name, v in means.items():
        if name not in out.columns:
            out[name] = np.full(n, v, dtype=float)
    if "temp_sky" not in out.columns:
        if fc.sky_source in ("series", "constants"):
            out["temp_sky"] = np.full(n, fc.temp_sky)
        else:
            rh = out["relative_humidity"].to_numpy(float)
            zenith = None
            if st["sky_view"] == "specular" and tilt_deg is not None:
                zenith = 2.0 * float(tilt_deg)
            kw: dict[str, Any] = {"band": st["sky_band"], "zenith_deg": zenith}
            t_air = out["temp_air"].to_numpy(float)
            sky = np.asarray(radiometry.sky_temperature(t_air, None, **kw), dtype=float) * np.ones(n)
            has_rh = np.isfinite(rh)
            if has_rh.any():  # humidity-based model where the humidity is known
                sky[has_rh] = radiometry.sky_temperature(t_air[has_rh], rh[has_rh], **kw)
            out["temp_sky"] = sky
    cols = ["time", "poa_global", "temp_air", "wind_speed", "temp_sky", "relative_humidity", "time_source",
            "frame_id"]
    return out[cols]


# ---------------------------------------------------------------------------------------
# Flight wrapper
# ---------------------------------------------------------------------------------------
def conditions_for_flight(flight: Flight, modules: gpd.GeoDataFrame, *, gsd_m: float | None = None,
                          settings: Mapping[str, Any] | None = None
                          ) -> tuple[FlightConditions, pd.DataFrame, Validity]:
    """Flight conditions, per-module conditions and validity of a :class:`~pvscan.io.manifest.Flight`.

    Reads ``flight.conditions.series`` and ``flight.flight.frames`` when given (frames in
    the modules' CRS), passes ``flight.layout.tilt_deg`` for the sky view and
    ``flight.module`` for the cell size.

    Parameters
    ----------
    flight : pvscan.io.manifest.Flight
    modules : geopandas.GeoDataFrame
        Modules (in the ortho's CRS) as measured.
    gsd_m : float, optional
        Ground sampling distance of the ortho [m/px].
    settings : Mapping, optional
        The ``[conditions]`` pipeline section.

    Returns
    -------
    (FlightConditions, pandas.DataFrame, Validity)
    """
    st = _settings(settings)
    spec = flight.conditions
    series = read_weather_series(spec.series) if spec.series else None
    frames = read_frames(flight.flight.frames, modules.crs) if flight.flight.frames else None
    fc = flight_conditions(spec, flight.flight.start, flight.flight.end, series, settings=st)
    tilt = flight.layout.tilt_deg
    mc = module_conditions(modules, spec, flight.flight.start, flight.flight.end, series=series, frames=frames,
                           settings=st, tilt_deg=tilt)
    validity = check_validity(fc, mc, gsd_m=gsd_m, module_spec=flight.module, settings=st)
    return fc, mc, validity
