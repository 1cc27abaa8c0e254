"""Geometry of the result files: lon/lat GeoJSON objects and anomaly regions.

GeoJSON is in WGS84 longitude/latitude (RFC 7946 section 4), with counter-clockwise
exterior rings and clockwise holes (the right-hand rule of RFC 7946 section 3.1.6),
positions rounded to ``[outputs] lonlat_decimals`` and no ``crs`` member.

An anomaly's geometry is its affected region, built from the module-local frame of the
modules frame (columns ``fx0, fy0, fux, fuy, fvx, fvy``): a local box ``(u0, u1, v0, v1)``
maps to the quadrilateral with corners ``(fx0, fy0) + u * (fux, fuy) + v * (fvx, fvy)``.
Anomalies over several modules (``open_string``, ``pid``) are the union of their modules,
with the small gaps between neighbouring modules closed.

References
----------
.. [1] H. Butler et al., "The GeoJSON Format", IETF RFC 7946, 2016. doi:10.17487/RFC7946
"""
from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer
from shapely.geometry import MultiPolygon, Point, Polygon, mapping
from shapely.geometry.polygon import orient

from pvscan.errors import OutputError

__all__ = ["geometry_to_geojson", "geoms_to_geojson", "to_lonlat", "region_geometry",
           "anomaly_geometries", "anomaly_indices"]

def _round_coords(coords: Iterable, nd: int) -> list:
    return [[round(float(c), nd) for c in xy[:2]] for xy in coords]


def _polygon_to_rings(poly: Polygon, nd: int) -> list:
    poly = orient(poly, sign=1.0)  # exterior CCW, interiors CW (RFC 7946 3.1.6)
    rings = [_round_coords(poly.exterior.coords, nd)]
    rings += [_round_coords(r.coords, nd) for r in poly.interiors]
    return rings


def geometry_to_geojson(geom: Any, decimals: int = 7) -> dict | None:
    """A GeoJSON geometry object of a shapely geometry already in lon/lat.

    Polygons follow the right-hand rule (RFC 7946 section 3.1.6) and positions are rounded
    to ``decimals``. Empty or missing geometry gives ``None`` (a feature with null geometry).
    """
    if geom is None or geom.is_empty:
        return None
    if isinstance(geom, Polygon):
        return {"type": "Polygon", "coordinates": _polygon_to_rings(geom, decimals)}
    if isinstance(geom, MultiPolygon):
        return {"type": "MultiPolygon", "coordinates": [_polygon_to_rings(p, decimals) for p in geom.geoms]}
    if isinstance(geom, Point):
        return {"type": "Point", "coordinates": [round(geom.x, decimals), round(geom.y, decimals)]}
    if geom.geom_type == "GeometryCollection":
        polys = [g for g in geom.geoms if isinstance(g, (Polygon, MultiPolygon))]
        if polys:
            return geometry_to_geojson(shapely.union_all(polys), decimals)
    gj = mapping(geom)
    return json.loads(json.dumps(gj))


def to_lonlat(geoms: Sequence, crs: Any) -> list:
    """Reproject shapely geometries from ``crs`` to WGS84 lon/lat (one pyproj call for all)."""
    if crs is None:
        raise OutputError("modules: the layout has no CRS; cannot write lon/lat")
    src = CRS.from_user_input(crs)
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = list(geoms)
    if src.equals(CRS.from_epsg(4326)) or len(arr) == 0:
        return list(arr)
    tr = Transformer.from_crs(src, 4326, always_xy=True)
    return list(shapely.transform(arr, lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1]))))


def geoms_to_geojson(geoms: Sequence, decimals: int = 7) -> list:
    """:func:`geometry_to_geojson` of many lon/lat geometries; hole-free polygons in one vectorised pass."""
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = list(geoms)
    out: list = [None] * len(arr)
    if len(arr) == 0:
        return out
    missing = shapely.is_missing(arr)
    present = ~missing
    present[present] = ~shapely.is_empty(arr[present])
    tid = np.full(len(arr), -1)
    tid[present] = shapely.get_type_id(arr[present])
    simple = present & (tid == 3)
    simple[simple] = shapely.get_num_interior_rings(arr[simple]) == 0
    pos = np.flatnonzero(simple)
    if pos.size:
        ext = shapely.get_exterior_ring(shapely.orient_polygons(arr[pos], exterior_cw=False))
        coords, index = shapely.get_coordinates(ext, return_index=True)
        lst = np.round(coords, decimals).tolist()
        counts = np.bincount(index, minlength=pos.size)
        start = 0
        for k, c in zip(pos.tolist(), counts.tolist()):
            out[k] = {"type": "Polygon", "coordinates": [lst[start:start + c]]}
            start += c
    for k in np.flatnonzero(present & ~simple).tolist():
        out[k] = geometry_to_geojson(arr[k], decimals)
    return out


def _frame_box(row: Any, u0: float, u1: float, v0: float, v1: float) -> Polygon:
    ox, oy = float(row["fx0"]), float(row["fy0"])
    ux, uy = float(row["fux"]), float(row["fuy"])
    vx, vy = float(row["fvx"]), float(row["fvy"])
    pts = [(ox + u * ux + v * vx, oy + u * uy + v * vy) for u, v in ((u0, v0), (u1, v0), (u1, v1), (u0, v1))]
    return Polygon(pts)


def _boxes(region_uv: Any) -> list[tuple[float, float, float, float]]:
    if region_uv is None:
        return []
    if isinstance(region_uv, float) and math.isnan(region_uv):
        return []
    arr = np.asarray(region_uv, dtype=float)
    if arr.size == 0:
        return []
    arr = arr.reshape(-1, 4)
    out = []
    for u0, u1, v0, v1 in arr:
        u0, u1 = sorted((min(max(u0, 0.0), 1.0), min(max(u1, 0.0), 1.0)))
        v0, v1 = sorted((min(max(v0, 0.0), 1.0), min(max(v1, 0.0), 1.0)))
        out.append((u0, u1, v0, v1))
    return out


def anomaly_indices(row: Any) -> list[int]:
    """Row numbers (in the modules frame) of the modules an anomaly covers, its own first."""
    idx = row.get("module_indices") if hasattr(row, "get") else None
    if idx is None or (isinstance(idx, float) and math.isnan(idx)):
        idx = []
    idx = [int(i) for i in np.asarray(idx).ravel()] if len(np.atleast_1d(idx)) else []
    first = row.get("module_index")
    if first is not None and not (isinstance(first, float) and math.isnan(first)):
        first = int(first)
        if first not in idx:
            idx = [first] + idx
    return idx


def region_geometry(modules: Any, anomaly: Mapping, merge_gap_m: float = 0.05) -> Any:
    """The affected region of one anomaly, in the modules' CRS.

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        The modules frame (footprints and module-local frame columns).
    anomaly : mapping
        One anomaly row: ``module_index``, optional ``module_indices`` and ``region_uv``
        (list of local boxes ``(u0, u1, v0, v1)``, each 0..1).
    merge_gap_m : float
        Gaps between the modules of a multi-module region up to this width are closed. [m]

    Returns
    -------
    shapely geometry
        A Polygon (or MultiPolygon when the parts are apart). Boxes covering a whole module
        use the footprint as drawn; smaller boxes use the module-local frame.
    """
    idx = anomaly_indices(anomaly)
    boxes = _boxes(anomaly.get("region_uv"))
    if not boxes:
        boxes = [(0.0, 1.0, 0.0, 1.0)]
    has_frame = all(c in modules.columns for c in ("fx0", "fy0", "fux", "fuy", "fvx", "fvy"))
    parts = []
    for i in idx:
        row = modules.iloc[i]
        for b in boxes:
            if b == (0.0, 1.0, 0.0, 1.0) or not has_frame:
                parts.append(row.geometry)
            else:
                parts.append(_frame_box(row, *b))
    parts = [p for p in parts if p is not None and not p.is_empty]
    if not parts:
        return None
    if len(parts) == 1:
        return orient(parts[0], 1.0) if isinstance(parts[0], Polygon) else parts[0]
    geom = shapely.union_all(parts)
    if len(idx) > 1 and merge_gap_m > 0 and not isinstance(geom, Polygon):
        closed = geom.buffer(merge_gap_m / 2, join_style="mitre").buffer(-merge_gap_m / 2, join_style="mitre")
        if not closed.is_empty:
            geom = closed
    return geom


def anomaly_geometries(anomalies: pd.DataFrame, modules: Any, merge_gap_m: float = 0.05) -> list:
    """:func:`region_geometry` of every anomaly, in the modules' CRS (a list aligned with the rows)."""
    return [region_geometry(modules, row, merge_gap_m) for _, row in anomalies.iterrows()]
