"""``modules.geojson`` and ``anomalies.geojson``: RFC 7946 FeatureCollections.

One feature per module (footprint as drawn) and one per anomaly (its affected region), in
WGS84 lon/lat. Property floats are rounded to 4 decimals (0.1 mK, 0.1 mW) and NaN is
written as ``null``. The layout's electrical attributes (``string_id``, ``combiner_id``,
``inverter_id``) are carried into both files when the modules frame has them, so a crew
knows which string, combiner box and inverter to switch and measure.

References
----------
.. [1] H. Butler et al., "The GeoJSON Format", IETF RFC 7946, 2016. doi:10.17487/RFC7946
"""
from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan.errors import OutputError
from pvscan.io.geojson import remember_written
from pvscan.io.writers.atomic import atomic_write
from pvscan.io.writers.geometry import anomaly_geometries, anomaly_indices, geoms_to_geojson, to_lonlat
from pvscan.io.writers.values import column_values, dumps, round_floats, settings_of, to_jsonable

__all__ = ["MODULE_PROPERTIES", "ANOMALY_PROPERTIES", "ELECTRICAL_COLUMNS", "module_results",
           "modules_feature_collection", "anomalies_feature_collection", "write_modules_geojson",
           "write_anomalies_geojson", "validate_geojson_rfc7946"]

#: Electrical attributes of the layout carried through to every output when present.
ELECTRICAL_COLUMNS = ("string_id", "combiner_id", "inverter_id")

#: Properties of every feature of ``modules.geojson``, in this order (CONTRACT.md first, extras after).
MODULE_PROPERTIES = (
    "module_id", "table_id", "t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c",
    "t_std_k", "valid_fraction", "reference_c", "delta_t_k", "delta_t_norm_k", "defect",
    "power_loss_w",
    # extras
    "string_id", "string_index", "combiner_id", "inverter_id", "table_row", "table_col",
    "severity", "confidence", "anomaly_ids", "energy_loss_kwh_per_year",
)

#: Properties of every feature of ``anomalies.geojson``, in this order.
ANOMALY_PROPERTIES = (
    "anomaly_id", "module_id", "module_ids", "defect", "severity", "delta_t_k",
    "delta_t_norm_k", "t_max_c", "power_loss_w", "energy_loss_kwh_per_year", "priority",
    "confidence",
    # extras
    "walk_order", "table_id", "string_id", "combiner_id", "inverter_id", "other_defects",
    "action", "loss_method", "power_loss_w_flight", "iec_class", "region", "yearly_cost",
    "currency",
)

#: Module columns an anomaly takes from its first module when it has none of its own.
_FROM_MODULE = ("table_id", *ELECTRICAL_COLUMNS)

def _severity_rank(sev: Any) -> int:
    return {"safety": 0, "repair": 1, "monitor": 2}.get(sev, 3)


def module_results(n_modules: int, anomalies: pd.DataFrame | None, pmax_w: float | None = None) -> pd.DataFrame:
    """Per-module columns derived from the anomalies.

    Returns a DataFrame with index ``0..n_modules-1`` and columns ``defect``, ``severity``,
    ``confidence``, ``anomaly_ids`` (list), ``power_loss_w`` [W] and
    ``energy_loss_kwh_per_year`` [kWh/yr]. A module's defect is that of its most urgent
    anomaly (lowest priority number; else safety > repair > monitor); its losses are its own
    *shares* (:func:`pvscan.diagnose.loss.module_losses`), so an open string's loss is split over its
    modules and plant totals never double count. Healthy modules get ``defect = None`` and
    zero loss. Given ``pmax_w`` [W], a module's summed shares are capped at its nameplate.
    """
    from pvscan.diagnose.loss import module_losses

    out = pd.DataFrame({
        "defect": pd.Series([None] * n_modules, dtype=object),
        "severity": pd.Series([None] * n_modules, dtype=object),
        "confidence": np.full(n_modules, np.nan),
        "anomaly_ids": pd.Series([[] for _ in range(n_modules)], dtype=object),
        "power_loss_w": np.zeros(n_modules),
        "energy_loss_kwh_per_year": np.zeros(n_modules),
    })
    if anomalies is None or len(anomalies) == 0:
        return out
    best: dict[int, tuple] = {}
    for pos, (_, row) in enumerate(anomalies.iterrows()):
        prio = row.get("priority")
        prio = float(prio) if prio is not None and not pd.isna(prio) else math.inf
        key = (prio, _severity_rank(row.get("severity")), pos)
        aid = row.get("anomaly_id")
        for i in anomaly_indices(row):
            if not 0 <= i < n_modules:
                continue
            if aid is not None and not pd.isna(aid):
                out.at[i, "anomaly_ids"] = out.at[i, "anomaly_ids"] + [str(aid)]
            if i not in best or key < best[i][0]:
                best[i] = (key, row)
    for i, (_, row) in best.items():
        out.at[i, "defect"] = row.get("defect")
        out.at[i, "severity"] = row.get("severity")
        conf = row.get("confidence")
        out.at[i, "confidence"] = float(conf) if conf is not None and not pd.isna(conf) else np.nan
    if "power_loss_w" in anomalies.columns:
        shares = module_losses(anomalies, n_modules, pmax_w)
        out["power_loss_w"] = shares["power_loss_w"].to_numpy()
        out["energy_loss_kwh_per_year"] = shares["energy_loss_kwh_per_year"].to_numpy()
    return out



def modules_feature_collection(modules: Any, module_table: pd.DataFrame | None = None,
                               anomalies: pd.DataFrame | None = None, decimals: int = 7,
                               pmax_w: float | None = None) -> dict:
    """The RFC 7946 FeatureCollection of ``modules.geojson`` (see :func:`write_modules_geojson`)."""
    n = len(modules)
    if module_table is not None and len(module_table) != n:
        raise OutputError(f"modules.geojson: the module table has {len(module_table)} rows for {n} modules")
    derived = module_results(n, anomalies, pmax_w) if anomalies is not None else None
    geoms = geoms_to_geojson(to_lonlat(list(modules.geometry), modules.crs), decimals)
    columns: dict[str, list] = {}
    for key in MODULE_PROPERTIES:
        for frame in (module_table, modules, derived):
            if frame is not None and key in frame.columns:
                columns[key] = column_values(frame, key)
                break
        else:
            columns[key] = [[] for _ in range(n)] if key == "anomaly_ids" else [None] * n
    for key in ("module_id", "table_id", *ELECTRICAL_COLUMNS):
        columns[key] = [None if v is None else str(v) for v in columns[key]]
    columns["anomaly_ids"] = [[] if v is None else v for v in columns["anomaly_ids"]]
    columns["power_loss_w"] = [0.0 if p is None and d is None else p
                               for p, d in zip(columns["power_loss_w"], columns["defect"])]
    # one dict per feature, built by zipping whole columns (no per-key lookups)
    props = [dict(zip(MODULE_PROPERTIES, vals)) for vals in zip(*(columns[key] for key in MODULE_PROPERTIES))]
    features = [{"type": "Feature", "id": mid, "geometry": geom, "properties": p}
                for mid, geom, p in zip(columns["module_id"], geoms, props)]
    return {"type": "FeatureCollection", "features": features}


def write_modules_geojson(path: str | os.PathLike, modules_gdf: Any, module_table: pd.DataFrame | None = None,
                          anomalies: pd.DataFrame | None = None, settings: Mapping | None = None,
                          module_spec: Any = None) -> Path:
    """Write ``modules.geojson``: one RFC 7946 feature per module, footprint as drawn.

    Parameters
    ----------
    path : path-like
        Output file.
    modules_gdf : geopandas.GeoDataFrame
        The modules frame (``module_id``, ``table_id``, ``string_id``, ``string_index``,
        ``table_row``, ``table_col``, geometry) in a projected CRS.
    module_table : pandas.DataFrame, optional
        Aligned with the modules (same length, same order): ``t_mean_c, t_median_c,
        t_p95_c, t_max_c, t_min_c`` [degC], ``t_std_k`` [K], ``valid_fraction`` [-],
        ``reference_c`` [degC], ``delta_t_k``, ``delta_t_norm_k`` [K] and optionally
        ``defect``, ``severity``, ``confidence``, ``power_loss_w`` [W].
    anomalies : pandas.DataFrame, optional
        Ranked anomalies; they fill ``defect``, ``severity``, ``confidence``,
        ``anomaly_ids`` and the per-module loss shares where the module table lacks them.
    settings : mapping, optional
        The pipeline (or its ``[outputs]`` section).
    module_spec : ModuleSpec, optional
        Its ``pmax_w`` [W] caps a module's summed loss shares.

    Notes
    -----
    Values that are NaN are written as ``null``; a healthy module has ``defect: null``
    and ``power_loss_w: 0``.
    """
    cfg = settings_of(settings)
    pmax = getattr(module_spec, "pmax_w", None) if module_spec is not None else None
    fc = modules_feature_collection(modules_gdf, module_table, anomalies, cfg["lonlat_decimals"], pmax)
    out = atomic_write(path, dumps(fc))
    remember_written(out, fc)  # the report reads it back in this process
    return out


def anomalies_feature_collection(anomalies: pd.DataFrame, modules: Any, decimals: int = 7,
                                 merge_gap_m: float = 0.05, settings: Mapping | None = None) -> dict:
    """The RFC 7946 FeatureCollection of ``anomalies.geojson`` (see :func:`write_anomalies_geojson`)."""
    from pvscan.io.writers.walk import prepare_anomalies

    anomalies = prepare_anomalies(anomalies, modules, settings)
    geoms = geoms_to_geojson(to_lonlat(anomaly_geometries(anomalies, modules, merge_gap_m), modules.crs),
                             decimals)
    features = []
    for pos, (_, row) in enumerate(anomalies.iterrows()):
        idx = anomaly_indices(row)
        props = {}
        for key in ANOMALY_PROPERTIES:
            val = row.get(key) if key in anomalies.columns else None
            if key == "module_ids" and (val is None or not len(np.atleast_1d(val))):
                val = [modules["module_id"].iloc[i] for i in idx] if "module_id" in modules.columns else []
            if key == "module_id" and (val is None or (isinstance(val, float) and math.isnan(val))):
                val = modules["module_id"].iloc[idx[0]] if idx else None
            if key == "other_defects" and val is None:
                val = []
            props[key] = round_floats(to_jsonable(val))
        props["module_ids"] = [str(m) for m in props["module_ids"]]
        for key in ("module_id", *_FROM_MODULE):
            if props[key] is not None:
                props[key] = str(props[key])
        features.append({"type": "Feature", "id": props["anomaly_id"], "geometry": geoms[pos], "properties": props})
    return {"type": "FeatureCollection", "features": features}


def write_anomalies_geojson(path: str | os.PathLike, anomalies: pd.DataFrame, modules_gdf: Any,
                            settings: Mapping | None = None) -> Path:
    """Write ``anomalies.geojson``: one RFC 7946 feature per anomaly, geometry = its affected region.

    Parameters
    ----------
    path : path-like
        Output file.
    anomalies : pandas.DataFrame
        Classified, loss-estimated and ranked anomalies (columns of DEVELOPERS.md: ``module_index``,
        ``module_indices``, ``region_uv``, ``defect``, ``severity``, ``delta_t_k`` [K],
        ``power_loss_w`` [W], ``energy_loss_kwh_per_year`` [kWh/yr], ``priority``, ...).
        Missing ``anomaly_id`` values are assigned by :func:`pvscan.diagnose.rank.assign_anomaly_ids`.
    modules_gdf : geopandas.GeoDataFrame
        The modules frame (positions as drawn, module-local frame columns).
    settings : mapping, optional
        The pipeline (or its ``[outputs]`` section): ``lonlat_decimals``, ``merge_gap_m``.

    Notes
    -----
    Features are written in priority order, each with its ``walk_order``
    (:mod:`pvscan.io.writers.walk`) and its first module's ``table_id``, ``string_id``,
    ``combiner_id`` and ``inverter_id``. ``power_loss_w`` is at STC; an anomaly over several
    modules carries the run's total loss (the modules file carries each module's share).
    """
    cfg = settings_of(settings)
    fc = anomalies_feature_collection(anomalies, modules_gdf, cfg["lonlat_decimals"], cfg["merge_gap_m"],
                                      settings=cfg)
    out = atomic_write(path, dumps(fc))
    remember_written(out, fc)
    return out



def _signed_area(ring: Sequence[Sequence[float]]) -> float:
    a = 0.0
    for (x0, y0), (x1, y1) in zip(ring[:-1], ring[1:]):
        a += x0 * y1 - x1 * y0
    return a / 2.0


def _check_position(p: Any, where: str, problems: list[str]) -> None:
    if not isinstance(p, list) or len(p) < 2 or not all(isinstance(c, (int, float)) and not isinstance(c, bool)
                                                         for c in p):
        problems.append(f"{where}: position is not a list of 2 or 3 numbers")
        return
    lon, lat = p[0], p[1]
    if not (-180.0 <= lon <= 180.0):
        problems.append(f"{where}: longitude {lon} outside -180..180")
    if not (-90.0 <= lat <= 90.0):
        problems.append(f"{where}: latitude {lat} outside -90..90")


def _check_polygon(rings: Any, where: str, problems: list[str]) -> None:
    if not isinstance(rings, list) or not rings:
        problems.append(f"{where}: polygon without rings")
        return
    for k, ring in enumerate(rings):
        w = f"{where} ring {k}"
        if not isinstance(ring, list) or len(ring) < 4:
            problems.append(f"{w}: a linear ring needs at least 4 positions")
            continue
        for p in ring:
            _check_position(p, w, problems)
        if ring[0] != ring[-1]:
            problems.append(f"{w}: ring is not closed")
            continue
        area = _signed_area(ring)
        if k == 0 and area <= 0:
            problems.append(f"{w}: exterior ring is not counter-clockwise (RFC 7946 3.1.6)")
        if k > 0 and area >= 0:
            problems.append(f"{w}: hole is not clockwise (RFC 7946 3.1.6)")


def _check_geometry(g: Any, where: str, problems: list[str]) -> None:
    if g is None:
        return
    if not isinstance(g, Mapping) or "type" not in g:
        problems.append(f"{where}: geometry is not an object with a type")
        return
    if "crs" in g:
        problems.append(f"{where}: geometry has a 'crs' member (removed in RFC 7946)")
    t, c = g["type"], g.get("coordinates")
    if t == "Point":
        _check_position(c, where, problems)
    elif t in ("MultiPoint", "LineString"):
        for p in c or []:
            _check_position(p, where, problems)
    elif t == "MultiLineString":
        for line in c or []:
            for p in line:
                _check_position(p, where, problems)
    elif t == "Polygon":
        _check_polygon(c, where, problems)
    elif t == "MultiPolygon":
        for j, poly in enumerate(c or []):
            _check_polygon(poly, f"{where} part {j}", problems)
    elif t == "GeometryCollection":
        for j, sub in enumerate(g.get("geometries", [])):
            _check_geometry(sub, f"{where} member {j}", problems)
    else:
        problems.append(f"{where}: unknown geometry type {t!r}")


def validate_geojson_rfc7946(obj: Mapping) -> list[str]:
    """Problems that make ``obj`` not a valid RFC 7946 FeatureCollection (empty list when valid).

    Checks: a FeatureCollection of Features each with ``geometry`` and ``properties``
    members; no ``crs`` member; positions of 2 or 3 numbers with longitude in -180..180 and
    latitude in -90..90 (WGS84, RFC 7946 section 4); linear rings closed with at least 4
    positions; exterior rings counter-clockwise and holes clockwise (section 3.1.6).
    """
    problems: list[str] = []
    if not isinstance(obj, Mapping) or obj.get("type") != "FeatureCollection":
        return ["top level: not a FeatureCollection"]
    if "crs" in obj:
        problems.append("top level: has a 'crs' member (removed in RFC 7946)")
    feats = obj.get("features")
    if not isinstance(feats, list):
        return problems + ["top level: 'features' is not a list"]
    for i, f in enumerate(feats):
        where = f"feature {i}"
        if not isinstance(f, Mapping) or f.get("type") != "Feature":
            problems.append(f"{where}: not a Feature")
            continue
        if "geometry" not in f or "properties" not in f:
            problems.append(f"{where}: a Feature needs 'geometry' and 'properties' members")
        if "crs" in f:
            problems.append(f"{where}: has a 'crs' member (removed in RFC 7946)")
        _check_geometry(f.get("geometry"), where, problems)
    return problems
