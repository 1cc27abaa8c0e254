"""``workorders.csv``: one row per anomaly, a file a crew can take to the field on its own.

Each row says where to go (table, row, column, string, combiner box, inverter, lon/lat and
projected x/y), what was found (defect, severity, temperatures, loss) and what to do
(``action``); ``priority`` ranks the work, ``walk_order`` is the order to visit it on site
(:mod:`pvscan.io.writers.walk`). Every row also names the site, the flight and its date,
and has an empty ``status`` column for the crew to fill in. The README documents every column.
"""
from __future__ import annotations

import csv
import io
import os
from collections.abc import Mapping
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer

from pvscan.io.resources import load_schema
from pvscan.io.writers.atomic import atomic_write
from pvscan.io.writers.geometry import anomaly_geometries, anomaly_indices
from pvscan.io.writers.values import LIST_SEP, csv_cell, round_floats, settings_of, to_jsonable

__all__ = ["WORKORDER_COLUMNS", "workorders_table", "write_workorders_csv", "read_workorders_csv",
           "flight_identity"]

#: Columns of ``workorders.csv``, in this order.
WORKORDER_COLUMNS = (
    "priority", "walk_order", "anomaly_id", "module_id", "module_ids", "table_id", "table_row",
    "table_col", "string_id", "string_index", "combiner_id", "inverter_id", "defect", "severity",
    "action", "delta_t_k", "delta_t_norm_k", "power_loss_w", "energy_loss_kwh_per_year",
    "yearly_cost", "currency", "confidence", "lon", "lat", "x", "y", "crs", "site", "flight_id",
    "flight_date", "status",
)

_TEXT = ("module_id", "table_id", "string_id", "combiner_id", "inverter_id")


def _crs_name(crs: Any) -> str:
    crs = CRS.from_user_input(crs)
    auth = crs.to_authority()
    return f"{auth[0]}:{auth[1]}" if auth else crs.to_string()


def _get(obj: Any, *keys: str) -> Any:
    for k in keys:
        v = obj.get(k) if isinstance(obj, Mapping) else getattr(obj, k, None)
        if v not in (None, ""):
            return v
    return None


def flight_identity(site: Any = None, flight: Any = None) -> dict:
    """``site``, ``flight_id`` and ``flight_date`` of the work orders.

    Parameters
    ----------
    site : str, mapping or Site, optional
        The site's name (or a record with ``name``).
    flight : mapping or FlightInfo, optional
        A record with ``id`` and ``start`` (aware datetime or ISO 8601 text).

    Returns
    -------
    dict
        ``flight_date`` is the calendar date of the flight's start where it was flown
        (its own UTC offset), ISO 8601 ``YYYY-MM-DD``; None when unknown.
    """
    name = site if isinstance(site, str) else (_get(site, "name") if site is not None else None)
    fid = _get(flight, "id", "flight_id") if flight is not None else None
    start = _get(flight, "start") if flight is not None else None
    day = None
    if isinstance(start, datetime):
        day = start.date().isoformat()
    elif start is not None:
        try:
            day = datetime.fromisoformat(str(start).replace("Z", "+00:00")).date().isoformat()
        except ValueError:
            day = None
    return {"site": None if name is None else str(name), "flight_id": None if fid is None else str(fid),
            "flight_date": day}


def workorders_table(anomalies: pd.DataFrame, modules_gdf: Any, site_crs: Any=None, settings: Mapping | None = None,
                     *, site: Any = None, flight: Any = None) -> Any:
    """The work orders as a GeoDataFrame of points (region centroids) in ``site_crs``.

    Columns are :data:`WORKORDER_COLUMNS`; lists (``module_ids``) are joined with ``;``.
    Rows are in priority order. ``lon, lat`` [deg] are WGS84 (``[outputs] lonlat_decimals``),
    ``x, y`` [m] are in ``site_crs`` (``xy_decimals``; default: the modules' CRS), named in
    the ``crs`` column. ``site``, ``flight`` name the site and the flight
    (:func:`flight_identity`); ``status`` is left empty for the crew.
    """
    import geopandas as gpd

    from pvscan.io.writers.walk import prepare_anomalies

    cfg = settings_of(settings)
    site_crs = CRS.from_user_input(site_crs if site_crs is not None else modules_gdf.crs)
    anomalies = prepare_anomalies(anomalies, modules_gdf, cfg)
    ident = flight_identity(site, flight)
    n = len(anomalies)
    geoms = np.empty(n, dtype=object)
    geoms[:] = anomaly_geometries(anomalies, modules_gdf, float(cfg["merge_gap_m"]))
    present = ~shapely.is_missing(geoms)
    cxy = np.full((n, 2), np.nan)
    if present.any():
        cxy[present] = shapely.get_coordinates(shapely.centroid(geoms[present]))
    src = CRS.from_user_input(modules_gdf.crs)
    ll = np.column_stack(Transformer.from_crs(src, 4326, always_xy=True).transform(cxy[:, 0], cxy[:, 1])) \
        if n else cxy
    site_xy = cxy if src.equals(site_crs) or not n else np.column_stack(
        Transformer.from_crs(src, site_crs, always_xy=True).transform(cxy[:, 0], cxy[:, 1]))
    nd_ll, nd_xy = int(cfg["lonlat_decimals"]), int(cfg["xy_decimals"])
    crs_name = _crs_name(site_crs)
    rows: list[dict] = []
    points: list[Any] = []
    for k, (_, a) in enumerate(anomalies.iterrows()):
        rec = {col: round_floats(to_jsonable(a.get(col))) if col in anomalies.columns else None
               for col in WORKORDER_COLUMNS}
        mids = rec["module_ids"]
        if not mids:
            idx = anomaly_indices(a)
            mids = [modules_gdf["module_id"].iloc[i] for i in idx] if "module_id" in modules_gdf.columns else []
        rec["module_ids"] = LIST_SEP.join(str(m) for m in mids)
        if not present[k]:
            rec.update(lon=None, lat=None, x=None, y=None)
            points.append(None)
        else:
            x, y = float(site_xy[k, 0]), float(site_xy[k, 1])
            rec.update(lon=round(float(ll[k, 0]), nd_ll), lat=round(float(ll[k, 1]), nd_ll),
                       x=round(x, nd_xy), y=round(y, nd_xy))
            points.append(shapely.Point(x, y))
        rec["crs"] = crs_name
        rec.update(ident)
        rec["status"] = None
        for key in _TEXT:
            if rec[key] is not None:
                rec[key] = str(rec[key])
        rows.append(rec)
    frame = pd.DataFrame(rows, columns=list(WORKORDER_COLUMNS))
    return gpd.GeoDataFrame(frame, geometry=gpd.GeoSeries(points, crs=site_crs), crs=site_crs)


def write_workorders_csv(path: str | os.PathLike, anomalies: pd.DataFrame, modules_gdf: Any, site_crs: Any=None,
                         settings: Mapping | None = None, *, site: Any = None, flight: Any = None,
                         table: Any=None) -> Path:
    """Write ``workorders.csv``: one row per anomaly, in priority order.

    A plain comma-separated file with one header line (no comment lines), UTF-8, so any
    spreadsheet or GIS reads it. Columns: :data:`WORKORDER_COLUMNS`. Empty cells are
    missing values. ``lon, lat`` are WGS84 [deg] of the affected region's centroid, ``x, y``
    the same point in the site's projected CRS [m], named in the ``crs`` column. ``table``
    (from :func:`workorders_table`) is written as given when passed.
    """
    if table is None:
        table = workorders_table(anomalies, modules_gdf, site_crs, settings, site=site, flight=flight)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(WORKORDER_COLUMNS)
    for rec in table[list(WORKORDER_COLUMNS)].itertuples(index=False):
        w.writerow([csv_cell(to_jsonable(v)) for v in rec])
    return atomic_write(path, buf.getvalue())


def read_workorders_csv(path: str | os.PathLike) -> list[dict]:
    """Read ``workorders.csv`` back into typed rows (types from ``schemas/workorders.schema.json``).

    Empty cells become ``None``; numbers are parsed per the schema's declared type.
    """
    props = load_schema("workorders.schema.json")["properties"]
    out = []
    with open(path, newline="", encoding="utf-8") as fh:
        for raw in csv.DictReader(fh):
            rec = {}
            for k, v in raw.items():
                types = props.get(k, {}).get("type", "string")
                types = types if isinstance(types, list) else [types]
                if v == "":
                    rec[k] = None if "null" in types else v
                elif "integer" in types:
                    rec[k] = int(float(v))
                elif "number" in types:
                    rec[k] = float(v)
                else:
                    rec[k] = v
            out.append(rec)
    return out
