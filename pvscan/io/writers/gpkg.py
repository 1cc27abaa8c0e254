"""``pvscan.gpkg``: the result layers in one GeoPackage, styled for desktop GIS.

Layers ``modules`` (footprints with their results), ``anomalies`` (affected regions,
MultiPolygon) and ``workorders`` (points), all in the site's projected CRS, plus a default
style per layer in the ``layer_styles`` table (:mod:`pvscan.io.writers.styles`), so the
layers open coloured by severity and labelled with the priority.

References
----------
.. [1] Open Geospatial Consortium, "OGC GeoPackage Encoding Standard", OGC 12-128r18, 2021.
"""
from __future__ import annotations

import os
import sqlite3
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from shapely.geometry import MultiPolygon, Polygon

from pvscan.io.writers.atomic import atomic_path
from pvscan.io.writers.geojson import ANOMALY_PROPERTIES
from pvscan.io.writers.geometry import anomaly_geometries
from pvscan.io.writers.styles import LAYER_STYLES_SQL, layer_qml, layer_sld
from pvscan.io.writers.values import LIST_SEP, settings_of

__all__ = ["write_geopackage", "STYLED_LAYERS"]

_FRAME = ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")

#: Layer -> (geometry kind, label property, rule for features without a severity, description).
STYLED_LAYERS = {
    "modules": ("polygon", None, True, "modules coloured by the severity of their worst finding"),
    "anomalies": ("polygon", "priority", False, "anomalies by severity, labelled with the priority"),
    "workorders": ("point", "priority", False, "work orders by severity, labelled with the priority"),
}


def _flatten_lists(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy()
    for col in frame.columns:
        if col == frame.geometry.name:
            continue
        if frame[col].dtype == object:
            vals = frame[col].tolist()
            if any(isinstance(v, (list, tuple, np.ndarray)) for v in vals):
                frame[col] = [LIST_SEP.join(str(x) for x in v) if isinstance(v, (list, tuple, np.ndarray))
                              else (None if v is None else str(v)) for v in vals]
    return frame


def _write_styles(path: Path) -> None:
    """Add one default SLD style per layer to the GeoPackage's ``layer_styles`` table."""
    now = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
    con = sqlite3.connect(str(path), isolation_level=None)
    try:
        con.execute("BEGIN IMMEDIATE")
        geom_cols = dict(con.execute("SELECT table_name, column_name FROM gpkg_geometry_columns"))
        con.execute(LAYER_STYLES_SQL)
        con.execute("INSERT OR IGNORE INTO gpkg_contents (table_name, data_type, identifier, description, "
                    "last_change) VALUES ('layer_styles', 'attributes', 'layer_styles', "
                    "'default map styles (OGC SLD 1.1)', ?)", (now,))
        for layer, (kind, label, healthy, desc) in STYLED_LAYERS.items():
            if layer not in geom_cols:
                continue
            con.execute(
                "INSERT INTO layer_styles (f_table_catalog, f_table_schema, f_table_name, f_geometry_column, "
                "styleName, styleQML, styleSLD, useAsDefault, description, owner, ui, update_time) "
                "VALUES ('', '', ?, ?, ?, ?, ?, 1, ?, 'pvscan', '', ?)",
                (layer, geom_cols[layer], f"{layer} by severity",
                 layer_qml(layer, kind, label=label, healthy=healthy),
                 layer_sld(layer, kind, label=label, healthy=healthy), desc, now))
        con.execute("COMMIT")
    finally:
        con.close()


def write_geopackage(path: str | os.PathLike, modules: Any, anomalies: Any, workorders: Any,
                     settings: Mapping | None = None) -> Path:
    """Write a GeoPackage with layers ``modules``, ``anomalies`` and ``workorders``, styled.

    Parameters
    ----------
    path : path-like
        Output ``.gpkg`` file (written to a temporary sibling, then renamed into place).
    modules : geopandas.GeoDataFrame
        Module footprints with their result columns (e.g. the modules frame joined with
        :func:`~pvscan.io.writers.geojson.module_results` and the statistics), in the site's
        projected CRS.
    anomalies : geopandas.GeoDataFrame or pandas.DataFrame
        A GeoDataFrame of affected regions, or the anomalies DataFrame (its regions are
        built with :func:`~pvscan.io.writers.geometry.region_geometry` from ``modules``).
    workorders : geopandas.GeoDataFrame
        Points, as returned by :func:`~pvscan.io.writers.workorders.workorders_table`.
    settings : mapping, optional
        The pipeline or its ``[outputs]`` section.

    Notes
    -----
    List columns are stored as ``;``-joined text (GeoPackage has no list type). The
    frame columns ``fx0 ... fvy`` and ``region_uv`` are internal and left out. The
    ``layer_styles`` table holds a style per layer (``useAsDefault`` = 1) as OGC SLD 1.1 and
    as QML.
    """
    import geopandas as gpd

    cfg = settings_of(settings)
    path = Path(path)
    crs = modules.crs
    mod = gpd.GeoDataFrame(modules.drop(columns=[c for c in _FRAME if c in modules.columns]), crs=crs)
    if not isinstance(anomalies, gpd.GeoDataFrame):
        from pvscan.io.writers.walk import prepare_anomalies

        an = prepare_anomalies(anomalies, modules, cfg)
        geoms = anomaly_geometries(an, modules, float(cfg["merge_gap_m"]))
        keep = [c for c in ANOMALY_PROPERTIES if c in an.columns]
        an = gpd.GeoDataFrame(an[keep].reset_index(drop=True), geometry=gpd.GeoSeries(geoms, crs=crs), crs=crs)
    else:
        an = anomalies.drop(columns=[c for c in ("region_uv",) if c in anomalies.columns])
    an = gpd.GeoDataFrame(an, geometry=an.geometry.name, crs=an.crs)
    if len(an):
        an = an.set_geometry([g if g is None or isinstance(g, MultiPolygon) else MultiPolygon([g])
                              if isinstance(g, Polygon) else g for g in an.geometry], crs=an.crs)
    with atomic_path(path, suffix=".tmp.gpkg") as tmp:
        for layer, frame, gtype in (("modules", mod, None), ("anomalies", an, "MultiPolygon"),
                                    ("workorders", workorders, "Point")):
            frame = _flatten_lists(gpd.GeoDataFrame(frame).reset_index(drop=True))
            kwargs = {}
            if len(frame) == 0 and gtype:
                kwargs["geometry_type"] = gtype
            frame.to_file(tmp, layer=layer, driver="GPKG", engine="pyogrio", **kwargs)
        _write_styles(tmp)
    return path
