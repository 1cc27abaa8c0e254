"""Reading a flight's weather series (CSV) and camera frame footprints (GeoJSON).

Split from :mod:`pvscan.measure.conditions`, which re-exports the readers.
"""
from __future__ import annotations

import logging
import math
import os
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from pvscan.errors import ConditionsError
from pvscan.io.resources import load_schema
from pvscan.io.times import parse_datetime

if TYPE_CHECKING:  # pragma: no cover
    import geopandas

__all__ = ["WEATHER_COLUMNS", "read_weather_series", "read_frames"]

logger = logging.getLogger(__name__)

_PVSCAN_NAMES = {
    "poa_irradiance_w_m2": "poa_global",
    "ambient_c": "temp_air",
    "wind_m_s": "wind_speed",
    "sky_c": "temp_sky",
    "relative_humidity_pct": "relative_humidity",
    "cloud_okta": "cloud_okta",
}


def _weather_columns() -> dict[str, tuple[str, bool, tuple[float, float], str]]:
    schema = load_schema("weather.schema.json")
    req = set(schema["required"])
    return {
        col: (_PVSCAN_NAMES[col], col in req, (float(p["minimum"]), float(p["maximum"])), p["unit"])
        for col, p in schema["properties"].items()
        if col != "time"
    }


#: Weather series columns: name -> (pvscan name, required, plausible range, unit), from
#: ``schemas/weather.schema.json``.
WEATHER_COLUMNS: dict[str, tuple[str, bool, tuple[float, float], str]] = _weather_columns()


def _parse_time(text: str, where: str) -> datetime:
    """A series or frame time as UTC (:func:`pvscan.io.times.parse_datetime`)."""
    return parse_datetime(text, where, ConditionsError).astimezone(UTC)


def read_weather_series(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read a weather series (CSV) recorded during the flight.

    Columns: ``time`` (ISO 8601 with a UTC offset), ``poa_irradiance_w_m2`` [W/m2],
    ``ambient_c`` [degC], ``wind_m_s`` [m/s]; optional ``sky_c`` [degC],
    ``relative_humidity_pct`` [%], ``cloud_okta`` [okta]. Other columns are ignored. Empty
    cells are gaps (interpolated over); text that is not a number is an error.

    Parameters
    ----------
    path : path-like
        The CSV file.

    Returns
    -------
    pandas.DataFrame
        Index: tz-aware UTC times, sorted, named ``time``. Columns: the file's weather
        columns as float. ``attrs["source"]`` holds the path.

    Raises
    ------
    ConditionsError
        Missing file or column, an unparsable value, a time without offset, a duplicated
        time, a value outside its plausible range, or a column without any value; the
        message names the file, column and row (1 = first data row; line = row + 1).
    """
    path = Path(path)
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True, encoding="utf-8-sig")
    except FileNotFoundError:
        raise ConditionsError(f"{path}: weather series not found") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise ConditionsError(f"{path}: not a readable CSV: {str(exc).splitlines()[0]}") from None
    except OSError as exc:
        raise ConditionsError(f"{path}: cannot read: {exc.strerror}") from None
    raw.columns = [str(c).strip() for c in raw.columns]
    for col in ["time"] + [c for c, (_, req, _, _) in WEATHER_COLUMNS.items() if req]:
        if col not in raw.columns:
            raise ConditionsError(f"{path}: missing column {col!r} (have: {', '.join(raw.columns)})")
    if len(raw) == 0:
        raise ConditionsError(f"{path}: no data rows")
    times = [_parse_time(v, f"{path}: column 'time', row {i + 1} (line {i + 2})") for i, v in enumerate(raw["time"])]
    index = pd.DatetimeIndex(times, name="time").tz_convert("UTC")
    data = {}
    for col, (_, _, (lo, hi), unit) in WEATHER_COLUMNS.items():
        if col not in raw.columns:
            continue
        text = raw[col].astype(str).str.strip()
        vals = pd.to_numeric(text.where(text != ""), errors="coerce").to_numpy(dtype=float)
        bad = np.flatnonzero(np.isnan(vals) & (text != "").to_numpy() | np.isinf(vals))
        if bad.size:
            i = int(bad[0])
            raise ConditionsError(f"{path}: column {col!r}, row {i + 1} (line {i + 2}): "
                                  f"{raw[col].iloc[i]!r} is not a number")
        with np.errstate(invalid="ignore"):
            out = np.flatnonzero((vals < lo) | (vals > hi))
        if out.size:
            i = int(out[0])
            raise ConditionsError(
                f"{path}: column {col!r}, row {i + 1} (line {i + 2}): {vals[i]:g} {unit} outside {lo:g}..{hi:g}")
        if np.all(np.isnan(vals)):
            raise ConditionsError(f"{path}: column {col!r} has no values")
        data[col] = vals
    df = pd.DataFrame(data, index=index)
    dup = index.duplicated(keep=False)
    if dup.any():
        rows = np.flatnonzero(dup)[:2] + 1
        raise ConditionsError(f"{path}: column 'time': rows {rows[0]} and {rows[1]}"
            f" have the same time {index[rows[0] - 1].isoformat()}")
    if not index.is_monotonic_increasing:
        logger.info("%s: times not in order; sorted", path)
        df = df.sort_index()
    df.attrs["source"] = str(path)
    return df


def read_frames(path: str | os.PathLike[str], crs: Any) -> geopandas.GeoDataFrame:
    """Read the footprints of the camera frames, each with the time it was taken.

    Parameters
    ----------
    path : path-like
        GeoJSON (RFC 7946 lon/lat, or with a ``crs`` member), GeoPackage or Shapefile of
        polygons with a ``time`` property (ISO 8601 with a UTC offset); an optional
        ``frame_id`` (or ``frame``, ``id``) property.
    crs : pyproj.CRS or str
        Target CRS (the ortho's, projected in metres).

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``frame_id`` (str), ``time`` (tz-aware UTC), ``cx``, ``cy`` (footprint
        centroid [m]), ``geometry``; in ``crs``.

    Raises
    ------
    ConditionsError
        Missing or unreadable file, no ``time`` column, a time without offset or not ISO
        8601, a missing or empty geometry; the message names the file and feature.
    """
    import geopandas as gpd

    path = Path(path)
    if not path.exists():
        raise ConditionsError(f"{path}: frames file not found")
    try:
        gdf = gpd.read_file(path, engine="pyogrio", datetime_as_string=True)
    except Exception as exc:  # pyogrio/GDAL raise their own families
        raise ConditionsError(f"{path}: cannot read frames: {str(exc).splitlines()[0]}") from None
    if "time" not in gdf.columns:
        raise ConditionsError(f"{path}: frames have no 'time' property")
    if len(gdf) == 0:
        raise ConditionsError(f"{path}: no frames")
    if gdf.crs is None:
        raise ConditionsError(f"{path}: frames have no CRS")
    id_col = next((c for c in ("frame_id", "frame", "id") if c in gdf.columns), None)
    ids = gdf[id_col].astype(str).tolist() if id_col else [str(i) for i in range(len(gdf))]
    times = []
    for i, (fid, t, g) in enumerate(zip(ids, gdf["time"], gdf.geometry)):
        where = f"{path}: frame {fid} (feature {i})"
        if g is None or g.is_empty:
            raise ConditionsError(f"{where}: missing or empty geometry")
        if g.geom_type not in ("Polygon", "MultiPolygon"):
            raise ConditionsError(f"{where}: geometry is {g.geom_type}, expected a polygon")
        if t is None or (isinstance(t, float) and math.isnan(t)):
            raise ConditionsError(f"{where}: missing time")
        times.append(_parse_time(str(t), where))
    out = gpd.GeoDataFrame(
        {"frame_id": ids, "time": pd.DatetimeIndex(times).tz_convert("UTC")},
        geometry=gdf.geometry.values,
        crs=gdf.crs,
    ).to_crs(crs)
    c = out.geometry.centroid
    out["cx"] = c.x.to_numpy()
    out["cy"] = c.y.to_numpy()
    return out
