"""Module layout: read, reproject, split tables, assign ids, build module-local frames.

A layout is a file of polygons (GeoJSON in RFC 7946 lon/lat or with a legacy ``crs``
member, GeoPackage, or Shapefile, in any CRS). Each polygon is either one module, used as
drawn, or a table (a feature with ``rows``/``cols`` properties, or any feature without a
``module_id`` when the manifest's ``[layout]`` gives rows and cols), split evenly into
rows x cols module footprints along the table's own axes, as seen from above.

Module-local frame
------------------
Every footprint is (close to) a rotated rectangle. Its frame maps local coordinates
``u`` (along the long side) and ``v`` (across the short side), both 0..1, to map
coordinates::

    (x, y) = (fx0, fy0) + u * (fux, fuy) + v * (fvx, fvy)      [m]

The frame is normalised so the module's *lower edge* (the side toward the azimuth the
modules face) is at ``u = 0`` (``lower_edge == "u"``: the long side runs up the slope,
e.g. portrait on a fixed-tilt table) or at ``v = 0`` (``lower_edge == "v"``: landscape),
and so that (U, V) is right-handed (counter-clockwise rings). Cells are
``(floor(u * n_along), floor(v * n_across))``; the bypass-diode substring is
``floor(v * bypass_diodes)``, a strip running the full length.

Ids
---
When the layout gives no ids: tables are ``T0001``, ``T0002`` ... in file order; modules
split from a table are ``<table_id>-R<row>-C<col>`` with row 1 the row at the lower-edge
side and col 1 the table end with the smallest easting (northing for tables running
north-south); loose module polygons without ``module_id`` are ``M00001`` ... in file order
and are grouped into tables of touching modules (``G0001`` ...).
"""
from __future__ import annotations

import logging
import math
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import shapely
from shapely.geometry import MultiPolygon, Polygon

from pvscan.errors import LayoutError, PvscanWarning

__all__ = [
    "read_layout",
    "build_modules",
    "frame_from_polygon",
    "region_polygon",
    "region_polygons",
    "uv_to_xy",
    "xy_to_uv",
    "FRAME_COLUMNS",
]

log = logging.getLogger(__name__)

FRAME_COLUMNS = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]
#: Columns of the modules frame before the geometry, in this order. ``combiner_id`` and
#: ``inverter_id`` (the combiner box and the inverter a module's string feeds) are optional
#: layout properties: None when the layout does not give them.
MODULE_COLUMNS = ["module_id", "table_id", "string_id", "string_index", "combiner_id", "inverter_id",
                  "table_row", "table_col"]
#: Optional electrical properties carried through as text ids (a table's value for each of its modules).
ELECTRICAL_IDS = ("combiner_id", "inverter_id")


class LayoutWarning(PvscanWarning):
    """A layout feature was repaired or looks inconsistent with the datasheet."""


# ----------------------------------------------------------------------------- frames
# The frame functions work on arrays of n footprints at once (shapely 2 array functions and
# numpy; no Python loop over features). Two-vector dot products are taken with batched
# matmul, one (1, 2) @ (2, 1) product per row: bit for bit what ``x @ y`` gives on one row,
# so a layout gives the same frames however many footprints are processed together.
def _dot(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Row-wise dot products of (n, 2) vectors (y may be (2,)) [same unit as the inputs]."""
    x = np.asarray(x, float)
    y = np.broadcast_to(np.asarray(y, float), x.shape)
    return np.matmul(x[:, None, :], y[:, :, None])[:, 0, 0]


def _facing_vector(azimuth_deg: float) -> np.ndarray:
    """Unit vector (east, north) of the direction the modules face [-]."""
    a = math.radians(azimuth_deg)
    return np.array([math.sin(a), math.cos(a)])


def _rect_axes_many(polys) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Centres and the two full-length side vectors of the minimum rotated rectangles.

    Rotating calipers over the edges of each convex hull (about the hull's first vertex,
    so map coordinates of 1e6 m keep sub-micrometre precision): the first edge direction
    whose bounding rectangle is smaller than every earlier one by more than 1e-12 m2.

    Returns
    -------
    centre, e1, e2 : numpy.ndarray
        (n, 2) [m]; e1 along the chosen hull edge, e2 across it.
    ok : numpy.ndarray
        (n,) bool; False for degenerate footprints (zero area, fewer than three corners).
    """
    polys = np.asarray(polys, dtype=object)
    n = len(polys)
    centre = np.full((n, 2), np.nan)
    e1 = np.full((n, 2), np.nan)
    e2 = np.full((n, 2), np.nan)
    ok = np.zeros(n, bool)
    if n == 0:
        return centre, e1, e2, ok
    rings = shapely.get_exterior_ring(shapely.convex_hull(polys))  # None unless a polygon
    coords, owner = shapely.get_coordinates(rings, return_index=True)
    counts = np.bincount(owner, minlength=n)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    for k in np.unique(counts[counts >= 4]):  # one vectorised pass per hull size
        sel = np.flatnonzero(counts == k)
        pts = coords[starts[sel, None] + np.arange(k)]  # (m, k, 2) closed ring
        ref = pts[:, 0].copy()
        pts = pts - ref[:, None, :]
        edges = np.diff(pts, axis=1)
        lens = np.hypot(edges[..., 0], edges[..., 1])
        keep = lens > 1e-12
        with np.errstate(invalid="ignore", divide="ignore"):
            dirs = edges / lens[..., None]  # (m, k - 1, 2)
        nrm = np.stack([-dirs[..., 1], dirs[..., 0]], axis=-1)
        a = np.matmul(pts[:, None, :, :], dirs[..., None])[..., 0]  # (m, k - 1, k)
        b = np.matmul(pts[:, None, :, :], nrm[..., None])[..., 0]
        a0, a1 = a.min(axis=2), a.max(axis=2)
        b0, b1 = b.min(axis=2), b.max(axis=2)
        area = (a1 - a0) * (b1 - b0)
        m = len(sel)
        best = np.full(m, np.inf)
        pick = np.full(m, -1)
        for e in range(k - 1):  # the calipers' sequential choice, on all footprints at once
            better = keep[:, e] & (area[:, e] < best - 1e-12)
            best = np.where(better, area[:, e], best)
            pick = np.where(better, e, pick)
        good = (pick >= 0) & (best > 0)
        r = np.arange(m)
        pk = np.maximum(pick, 0)
        d, nn = dirs[r, pk], nrm[r, pk]
        pa0, pa1, pb0, pb1 = a0[r, pk], a1[r, pk], b0[r, pk], b1[r, pk]
        centre[sel] = ref + d * (pa0 + pa1)[:, None] / 2 + nn * (pb0 + pb1)[:, None] / 2
        e1[sel] = d * (pa1 - pa0)[:, None]
        e2[sel] = nn * (pb1 - pb0)[:, None]
        ok[sel] = good
    return centre, e1, e2, ok


def _rect_axes(poly: Polygon) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centre and the two full-length side vectors of the minimum rotated rectangle."""
    centre, e1, e2, ok = _rect_axes_many([poly])
    if not ok[0]:
        raise ValueError("degenerate footprint")
    return centre[0], e1[0], e2[0]


def _frames_from_axes(centre, long_vec, short_vec, facing):
    """Normalised frames of n footprints: (n, 6) frames and (n,) ``lower_edge`` ("u"/"v").

    ``facing`` is (2,) or (n, 2), the map direction toward the lower edge. See
    :func:`frame_from_axes`.
    """
    U = np.array(long_vec, float, copy=True).reshape(-1, 2)
    V = np.array(short_vec, float, copy=True).reshape(-1, 2)
    c = np.asarray(centre, float).reshape(-1, 2)
    f = np.broadcast_to(np.asarray(facing, float), U.shape)
    uf, vf = _dot(U, f), _dot(V, f)
    with np.errstate(invalid="ignore", divide="ignore"):
        lower_u = np.abs(uf) / np.hypot(U[:, 0], U[:, 1]) >= np.abs(vf) / np.hypot(V[:, 0], V[:, 1])
    # lower edge at u = 0: U points away from the facing direction; then right-handed
    flip = lower_u & (uf > 0)
    U[flip] = -U[flip]
    flip = lower_u & (U[:, 0] * V[:, 1] - U[:, 1] * V[:, 0] < 0)
    V[flip] = -V[flip]
    flip = ~lower_u & (vf > 0)
    V[flip] = -V[flip]
    flip = ~lower_u & (U[:, 0] * V[:, 1] - U[:, 1] * V[:, 0] < 0)
    U[flip] = -U[flip]
    o = c - U / 2 - V / 2
    return np.column_stack([o, U, V]), np.where(lower_u, "u", "v").astype(object)


def frame_from_axes(centre, long_vec, short_vec, azimuth_deg: float, facing=None):
    """Normalised module frame from a centre and the long/short side vectors.

    Parameters
    ----------
    centre : (2,) array
        Footprint centre [m].
    long_vec, short_vec : (2,) array
        Full-length long and short side vectors [m].
    azimuth_deg : float
        Direction the modules face [deg].
    facing : (2,) array, optional
        Map direction toward the lower edge when known better than the azimuth (tables:
        toward their first row).

    Returns
    -------
    (fx0, fy0, fux, fuy, fvx, fvy, lower_edge)
    """
    f = _facing_vector(azimuth_deg) if facing is None else np.asarray(facing, float)
    fr, lower = _frames_from_axes(centre, long_vec, short_vec, f)
    return (*(float(x) for x in fr[0]), lower[0])


def _frames_from_polygons(polys, azimuth_deg: float):
    """Frames (n, 6), ``lower_edge`` (n,) and ok (n,) of module footprints (minimum rotated rectangles)."""
    centre, e1, e2, ok = _rect_axes_many(polys)
    first_long = np.hypot(e1[:, 0], e1[:, 1]) >= np.hypot(e2[:, 0], e2[:, 1])
    long_vec = np.where(first_long[:, None], e1, e2)
    short_vec = np.where(first_long[:, None], e2, e1)
    fr, lower = _frames_from_axes(centre, long_vec, short_vec, _facing_vector(azimuth_deg))
    return fr, lower, ok


def frame_from_polygon(poly: Polygon, azimuth_deg: float):
    """Module-local frame of a module footprint (its minimum rotated rectangle)."""
    fr, lower, ok = _frames_from_polygons([poly], azimuth_deg)
    if not ok[0]:
        raise ValueError("degenerate footprint")
    return (*(float(x) for x in fr[0]), lower[0])


def uv_to_xy(modules: pd.DataFrame, idx, u, v):
    """Map module-local (u, v) of module(s) ``idx`` to map coordinates [m]."""
    m = modules.iloc[idx] if not isinstance(idx, slice) else modules.iloc[idx]
    x = m["fx0"].to_numpy() + u * m["fux"].to_numpy() + v * m["fvx"].to_numpy()
    y = m["fy0"].to_numpy() + u * m["fuy"].to_numpy() + v * m["fvy"].to_numpy()
    return x, y


def xy_to_uv(frame: np.ndarray, x, y):
    """Invert the frame ``(fx0, fy0, fux, fuy, fvx, fvy)`` (arrays broadcast) for points (x, y)."""
    fx0, fy0, fux, fuy, fvx, fvy = (np.asarray(frame[..., k]) for k in range(6))
    det = fux * fvy - fuy * fvx
    dx = x - fx0
    dy = y - fy0
    u = (dx * fvy - dy * fvx) / det
    v = (fux * dy - fuy * dx) / det
    return u, v


def region_polygon(modules: pd.DataFrame, i: int, u0: float, u1: float, v0: float, v1: float) -> Polygon:
    """Map polygon of the box [u0, u1] x [v0, v1] of module ``i`` (counter-clockwise ring)."""
    r = modules.iloc[i]
    o = np.array([r["fx0"], r["fy0"]])
    U = np.array([r["fux"], r["fuy"]])
    V = np.array([r["fvx"], r["fvy"]])
    pts = [o + a * U + b * V for a, b in ((u0, v0), (u1, v0), (u1, v1), (u0, v1))]
    return Polygon(pts)


def region_polygons(modules: pd.DataFrame, i: int, boxes) -> Polygon | MultiPolygon:
    """Union of several (u0, u1, v0, v1) boxes of module ``i``."""
    polys = [region_polygon(modules, i, *b) for b in boxes]
    if len(polys) == 1:
        return polys[0]
    return shapely.union_all(polys)


# ----------------------------------------------------------------------------- reading
def _read_geojson(path: Path):
    """Read GeoJSON ourselves: properties stay exactly as written (GDAL would guess types and
    turn an id such as "T1006" into a time), and a legacy ``crs`` member is honoured."""
    import json

    import geopandas as gpd

    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise LayoutError(f"{path}: cannot read the layout: {exc}") from None
    if isinstance(doc, dict) and doc.get("type") == "Feature":
        doc = {"type": "FeatureCollection", "features": [doc]}
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection" or not isinstance(
            doc.get("features"), list):
        raise LayoutError(f"{path}: cannot read the layout: not a GeoJSON FeatureCollection")
    crs: Any = "EPSG:4326"  # RFC 7946: GeoJSON is WGS84 lon/lat
    legacy = doc.get("crs")
    if isinstance(legacy, dict):
        name = (legacy.get("properties") or {}).get("name")
        if name:
            from pyproj import CRS

            try:
                crs = CRS.from_user_input(name)
            except Exception:
                raise LayoutError(f"{path}: crs member {name!r} is not a known coordinate reference system") from None
    props, raw = [], []
    for k, feat in enumerate(doc["features"]):
        if not isinstance(feat, dict) or feat.get("type") != "Feature":
            raise LayoutError(f"{path}: feature #{k + 1}: not a GeoJSON Feature")
        props.append(dict(feat.get("properties") or {}))
        raw.append(feat.get("geometry"))
    geoms = _geojson_geometries(raw, props, path)
    return gpd.GeoDataFrame(pd.DataFrame(props, dtype=object) if props else None, geometry=geoms, crs=crs)


def _geojson_geometries(raw: list, props: list, path: Path) -> np.ndarray:
    """Shapely geometries of the features' GeoJSON members (one array build for plain polygons)."""
    from pvscan.io.geojson import shapes

    def bad(k: int, exc: Exception) -> None:
        name = _feature_name(pd.Series(props[k], dtype=object), k)
        raise LayoutError(f"{path}: {name}: invalid geometry: {exc}") from None

    return shapes(raw, bad)


def _read_file(path: Path):
    import geopandas as gpd

    if not path.exists():
        raise LayoutError(f"{path}: layout file not found")
    if path.suffix.lower() in (".geojson", ".json"):
        gdf = _read_geojson(path)
    else:
        try:
            gdf = gpd.read_file(path, engine="pyogrio")
        except Exception as exc:  # pyogrio raises its own DataSourceError etc.
            msg = " ".join(str(exc).split())
            raise LayoutError(f"{path}: cannot read the layout: {msg}") from None
    if len(gdf) == 0:
        raise LayoutError(f"{path}: the layout has no features")
    if gdf.crs is None:
        raise LayoutError(f"{path}: the layout has no coordinate reference system")
    return gdf


def _prop(row, *names, default=None):
    for n in names:
        if n in row.index:
            val = row[n]
            if val is None:
                continue
            if isinstance(val, float) and math.isnan(val):
                continue
            try:
                if pd.isna(val):
                    continue
            except (TypeError, ValueError):
                pass
            return val
    return default


def _feature_name(row, k: int) -> str:
    for key in ("module_id", "table_id", "id", "name"):
        v = _prop(row, key)
        if v is not None:
            return f"{key} {v}"
    return f"feature #{k + 1}"


#: Field names read for each layout property, in order of preference. Names compare
#: case-insensitively, with spaces and hyphens read as underscores; each name is also read
#: cut to the 10 characters a Shapefile keeps (``string_index`` -> ``string_ind``).
FIELD_NAMES = {
    "module_id": ("module_id", "moduleid", "module", "mod_id", "module_no", "module_nr", "module_name"),
    "table_id": ("table_id", "tableid", "table", "tbl_id", "table_no", "table_nr", "table_name"),
    "string_id": ("string_id", "stringid", "string", "str_id", "string_no", "string_nr", "string_name"),
    "string_index": ("string_index", "string_idx", "stringindex", "stringidx", "str_index", "str_idx",
                     "str_ind", "string_pos", "string_position", "str_pos", "pos_in_string",
                     "position_in_string", "string_order", "string_seq"),
    "combiner_id": ("combiner_id", "combinerid", "combiner", "combiner_box", "combinerbox", "combiner_box_id",
                    "cb_id", "cbid", "cb", "cb_no", "cb_nr", "cb_name", "combiner_no", "combiner_nr",
                    "combiner_name", "scb", "scb_id"),
    "inverter_id": ("inverter_id", "inverterid", "inverter", "inv_id", "invid", "inv", "inv_no", "inv_nr",
                    "inv_name", "inverter_no", "inverter_nr", "inverter_name"),
    "table_row": ("table_row", "tablerow", "tbl_row", "row", "row_no"),
    "table_col": ("table_col", "tablecol", "tbl_col", "col", "column", "col_no", "table_column", "position"),
    "rows": ("rows", "n_rows", "nrows", "num_rows"),
    "cols": ("cols", "n_cols", "ncols", "num_cols", "columns"),
    "orientation": ("orientation", "orientatn", "orient"),
}


def _norm_field(name) -> str:
    return "_".join(str(name).strip().lower().replace("-", " ").replace("_", " ").split())


def _field_keys() -> dict[str, str]:
    """Normalised field name -> the property it gives."""
    keys: dict[str, str] = {}
    for prop, names in FIELD_NAMES.items():
        for n in names:
            for k in (_norm_field(n), _norm_field(n)[:10]):
                if keys.setdefault(k, prop) != prop:
                    raise AssertionError(f"layout field {k} read for both {keys[k]} and {prop}")
    return keys


_FIELD_KEYS = _field_keys()


def layout_fields(columns) -> tuple[dict[str, str], list[str]]:
    """Which column gives which layout property.

    Parameters
    ----------
    columns : iterable of str
        The layout's field names.

    Returns
    -------
    fields : dict
        Property (``module_id``, ``string_index``, ...) -> the column read for it.
    notes : list of str
        One line per property given by several columns (the preferred one is read).
    """
    found: dict[str, list[tuple[int, str]]] = {}
    for col in columns:
        if col == "geometry":
            continue
        key = _norm_field(col)
        prop = _FIELD_KEYS.get(key)
        if prop is None:
            continue
        names = [_norm_field(n) for n in FIELD_NAMES[prop]]
        rank = min((i for i, n in enumerate(names) if key in (n, n[:10])), default=len(names))
        found.setdefault(prop, []).append((rank, col))
    fields, notes = {}, []
    for prop, cands in found.items():
        cands.sort(key=lambda rc: (rc[0], str(rc[1])))
        fields[prop] = cands[0][1]
        if len(cands) > 1:
            notes.append(f"fields {', '.join(str(c) for _, c in cands)} all give {prop}; "
                         f"{cands[0][1]} is read")
    return fields, notes


def _whole(value, field: str, name: str, path: Path) -> int | None:
    """A whole number from a field value (int, integral float, or text such as "3")."""
    if value is None:
        return None
    try:
        f = float(str(value).strip()) if isinstance(value, str) else float(value)
    except (TypeError, ValueError):
        raise LayoutError(f"{path}: {name}: {field} {value!r} is not a whole number") from None
    if not math.isfinite(f) or f != int(f):
        raise LayoutError(f"{path}: {name}: {field} {value!r} is not a whole number")
    return int(f)


def _ident(value) -> str | None:
    """An id as text; whole numbers that a GIS stored as floats (12.0) read as "12"."""
    if value is None:
        return None
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    text = str(value).strip()
    return text or None


def _as_polygon(geom, name: str, path: Path) -> Polygon:
    if geom is None or geom.is_empty:
        raise LayoutError(f"{path}: {name}: empty geometry")
    if geom.has_z:
        geom = shapely.force_2d(geom)
    if geom.geom_type == "MultiPolygon":
        parts = list(geom.geoms)
        if len(parts) != 1:
            raise LayoutError(f"{path}: {name}: a multipolygon of {len(parts)} parts is not one module or table")
        geom = parts[0]
    if geom.geom_type != "Polygon":
        raise LayoutError(f"{path}: {name}: {geom.geom_type} is not a polygon")
    if not geom.is_valid:
        reason = shapely.is_valid_reason(geom)
        fixed = shapely.make_valid(geom)
        polys = [g for g in getattr(fixed, "geoms", [fixed]) if g.geom_type == "Polygon"]
        if not polys:
            raise LayoutError(f"{path}: {name}: invalid polygon ({reason})")
        geom = max(polys, key=lambda g: g.area)
        warnings.warn(f"{path}: {name}: invalid polygon ({reason}) repaired", LayoutWarning, stacklevel=3)
    if geom.area <= 0:
        raise LayoutError(f"{path}: {name}: polygon has zero area")
    return geom


# Tables within this angle of north-south count columns from the south end [rad]; a layout
# stored as lon/lat at 7 decimals (about 1 cm) must not flip col 1 between ends.
_NS_TOLERANCE = math.radians(1.0)


def _eastward_many(vec: np.ndarray) -> np.ndarray:
    """Orient (n, 2) axes toward increasing easting, or northing for north-south ones."""
    vec = np.asarray(vec, float).reshape(-1, 2)
    ns = np.abs(vec[:, 0]) <= math.sin(_NS_TOLERANCE) * np.hypot(vec[:, 0], vec[:, 1])
    keep = np.where(ns, vec[:, 1] >= 0, vec[:, 0] > 0)
    return np.where(keep[:, None], vec, -vec)


def _eastward(vec: np.ndarray) -> np.ndarray:
    """Orient a table axis toward increasing easting, or northing for north-south tables."""
    return _eastward_many(vec)[0]


def _table_axes_many(polys, azimuth_deg: float):
    """Centres, long-axis vectors A (toward increasing easting), across vectors B (away from
    the facing direction, so row 1 is the lower row) and ok flags of n table rectangles."""
    centre, e1, e2, ok = _rect_axes_many(polys)
    first_long = np.hypot(e1[:, 0], e1[:, 1]) >= np.hypot(e2[:, 0], e2[:, 1])
    A = _eastward_many(np.where(first_long[:, None], e1, e2))
    B = np.where(first_long[:, None], e2, e1)
    flip = _dot(B, _facing_vector(azimuth_deg)) > 0
    B[flip] = -B[flip]
    return centre, A, B, ok


def _table_axes(poly: Polygon, azimuth_deg: float):
    """Centre, long-axis vector A and across vector B of one table's rectangle."""
    centre, A, B, ok = _table_axes_many([poly], azimuth_deg)
    if not ok[0]:
        raise ValueError("degenerate footprint")
    return centre[0], A[0], B[0]


def _split_tables(polys, rows, cols, portrait, gap_m: float, tilt_deg: float, azimuth_deg: float):
    """Split n table polygons into module footprints, all tables at once.

    Returns
    -------
    dict
        Per module, tables in input order and rows x cols inside each (row 1 first, col 1
        first): ``table`` (index into the input), ``row``, ``col`` (1-based), ``geometry``,
        ``frames`` (m, 6), ``lower_edge``.
    errors : dict
        Input index -> message, for tables that cannot be split.
    """
    rows = np.asarray(rows, np.int64)
    cols = np.asarray(cols, np.int64)
    portrait = np.asarray(portrait, bool)
    nt = len(rows)
    errors: dict[int, str] = {}
    centre, A, B, ok = _table_axes_many(polys, azimuth_deg)
    L = np.hypot(A[:, 0], A[:, 1])
    W = np.hypot(B[:, 0], B[:, 1])
    with np.errstate(invalid="ignore", divide="ignore"):
        a = A / L[:, None]
        b = B / W[:, None]
    gap_b = gap_m * math.cos(math.radians(tilt_deg))
    mod_a = (L - (cols - 1) * gap_m) / cols
    mod_b = (W - (rows - 1) * gap_b) / rows
    for i in np.flatnonzero(~ok):
        errors[int(i)] = "degenerate footprint"
    for i in np.flatnonzero(ok & ((mod_a <= 0) | (mod_b <= 0))):
        errors[int(i)] = (f"table of {L[i]:.2f} x {W[i]:.2f} m cannot hold {rows[i]} x {cols[i]} modules "
                          f"with {gap_m} m gaps")
    corner = centre - A / 2 - B / 2  # lower row, col 1 corner
    per = rows * cols
    t = np.repeat(np.arange(nt), per)
    k = np.arange(t.size) - np.repeat(np.cumsum(per) - per, per)
    r = k // cols[t]
    c = k % cols[t]
    at, bt = a[t], b[t]
    o = corner[t] + at * c[:, None] * (mod_a[t] + gap_m)[:, None] + bt * r[:, None] * (mod_b[t] + gap_b)[:, None]
    va = at * mod_a[t][:, None]
    vb = bt * mod_b[t][:, None]
    p1 = o + va
    pts = np.stack([o, p1, p1 + vb, o + vb], axis=1)
    good = np.isfinite(pts).all(axis=(1, 2))
    geoms = np.full(t.size, None, dtype=object)
    if good.any():
        ccw = shapely.is_ccw(shapely.linearrings(pts[good]))
        pg = pts[good]
        pg[~ccw] = pg[~ccw][:, ::-1]
        geoms[good] = shapely.polygons(pg)
    cen = o + va / 2 + vb / 2
    pt = portrait[t][:, None]
    frames, lower = _frames_from_axes(cen, np.where(pt, vb, va), np.where(pt, va, vb), -bt)
    return {"table": t, "row": r + 1, "col": c + 1, "geometry": geoms, "frames": frames,
            "lower_edge": lower}, errors


def split_table(poly: Polygon, rows: int, cols: int, orientation: str, gap_m: float,
                tilt_deg: float, azimuth_deg: float):
    """Split a table polygon into rows x cols module footprints.

    Parameters
    ----------
    poly : Polygon
        Table outline as seen from above, in a projected CRS [m].
    rows, cols : int
        Module rows across the table's long axis, modules along it.
    orientation : {"portrait", "landscape"}
        Portrait: the module's long side runs across the table's long axis.
    gap_m : float
        Gap between modules [m]; across the table it appears shortened by cos(tilt) from above.
    tilt_deg, azimuth_deg : float
        Module tilt and facing azimuth [deg].

    Returns
    -------
    list of (row, col, Polygon, frame)
        row 1 at the lower-edge side, col 1 at the table end with the smallest coordinate along
        the long axis.
    """
    res, errors = _split_tables([poly], [rows], [cols], [orientation == "portrait"], gap_m, tilt_deg,
                                azimuth_deg)
    if errors:
        raise ValueError(errors[0])
    return [(int(r), int(c), g, (*(float(x) for x in f), lo))
            for r, c, g, f, lo in zip(res["row"], res["col"], res["geometry"], res["frames"], res["lower_edge"])]


def _group_tables(polys, tol: float) -> np.ndarray:
    """Connected components of footprints closer than ``tol`` [m] (loose module layouts),
    numbered by their first member, so ids follow file order."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    polys = np.asarray(polys, dtype=object)
    tree = shapely.STRtree(polys)
    left, right = tree.query(polys, predicate="dwithin", distance=tol)
    n = len(polys)
    graph = coo_matrix((np.ones(len(left)), (left, right)), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    uniq, first = np.unique(labels, return_index=True)
    rank = np.empty(uniq.size, np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(uniq.size)
    return rank[np.searchsorted(uniq, labels)]


def _rank_positions(values: np.ndarray, tol: float | np.ndarray, groups: np.ndarray | None = None) -> np.ndarray:
    """1-based rank of clustered 1-D positions within each group (values closer than tol
    share a rank). ``tol`` may be a scalar or one value per position (its group's)."""
    values = np.asarray(values, float)
    groups = np.zeros(len(values), np.int64) if groups is None else np.asarray(groups)
    tols = np.broadcast_to(np.asarray(tol, float), values.shape)
    order = np.lexsort((values, groups))  # stable: ties keep their order
    v, g = values[order], groups[order]
    step = np.zeros(len(v), np.int64)
    if len(v) > 1:
        step[1:] = (np.diff(v) > tols[order][1:]) & (g[1:] == g[:-1])
    cs = np.cumsum(step)
    start = np.ones(len(v), bool)
    start[1:] = g[1:] != g[:-1]
    base = cs[np.flatnonzero(start)][np.cumsum(start) - 1]
    ranks = np.empty(len(values), np.int64)
    ranks[order] = cs - base + 1
    return ranks


def _rows_cols_for_loose(df: pd.DataFrame, groups: np.ndarray, azimuth_deg: float):
    """table_row/table_col of loose modules from their positions within each group."""
    groups = np.asarray(groups)
    fr = df[FRAME_COLUMNS].to_numpy(dtype=float)
    cx = df["fx0"].to_numpy(float) + 0.5 * df["fux"].to_numpy(float) + 0.5 * df["fvx"].to_numpy(float)
    cy = df["fy0"].to_numpy(float) + 0.5 * df["fuy"].to_numpy(float) + 0.5 * df["fvy"].to_numpy(float)
    pts = np.column_stack([cx, cy])
    _, first = np.unique(groups, return_index=True)
    lead = first[np.searchsorted(np.unique(groups), groups)]  # each member's group's first member
    U, V = fr[lead, 2:4], fr[lead, 4:6]
    lu, lv = np.hypot(U[:, 0], U[:, 1]), np.hypot(V[:, 0], V[:, 1])
    pu, pv = _dot(pts, U / lu[:, None]), _dot(pts, V / lv[:, None])
    # table long axis: the module axis along which the centres spread the most
    order = np.argsort(groups, kind="stable")
    cuts = np.flatnonzero(np.diff(groups[order])) + 1
    starts = np.concatenate([[0], cuts])
    gid = np.cumsum(np.isin(np.arange(len(order)), cuts))
    spread_u = np.maximum.reduceat(pu[order], starts) - np.minimum.reduceat(pu[order], starts)
    spread_v = np.maximum.reduceat(pv[order], starts) - np.minimum.reduceat(pv[order], starts)
    along_u = np.empty(len(groups), bool)
    along_u[order] = (spread_u > spread_v)[gid]
    axis = np.where(along_u[:, None], U, V)
    across = np.where(along_u[:, None], V, U)
    a = _eastward_many(axis / np.hypot(axis[:, 0], axis[:, 1])[:, None])
    b = across / np.hypot(across[:, 0], across[:, 1])[:, None]
    flip = _dot(b, _facing_vector(azimuth_deg)) > 0
    b[flip] = -b[flip]
    tol = 0.5 * np.minimum(lu, lv)
    cols = _rank_positions(_dot(pts, a), tol, groups)
    rows = _rank_positions(_dot(pts, b), tol, groups)
    return rows, cols


def _column(df: pd.DataFrame, *names) -> tuple[np.ndarray, np.ndarray]:
    """The first non-missing value among columns ``names`` of each row (object array) and
    whether there was one (None, NaN, NA and NaT count as missing)."""
    n = len(df)
    vals = np.full(n, None, dtype=object)
    have = np.zeros(n, bool)
    for name in names:
        if name in df.columns:
            col = df[name]
            take = ~have & ~col.isna().to_numpy()
            if take.any():
                vals[take] = col.to_numpy(dtype=object)[take]
                have |= take
    return vals, have


def _strs(vals: np.ndarray, have: np.ndarray) -> np.ndarray:
    """Ids as text (:func:`_ident`) of present values, None elsewhere (object array)."""
    out = np.full(len(vals), None, dtype=object)
    if have.any():
        out[have] = [_ident(v) for v in vals[have]]
    return out


def _ints(vals: np.ndarray, have: np.ndarray, field: str, where: np.ndarray, name_of, path: Path) -> np.ndarray:
    """Whole numbers (:func:`_whole`) of present values, None elsewhere (object array);
    ``where`` gives each value's feature, named in the error."""
    out = np.full(len(vals), None, dtype=object)
    for j in np.flatnonzero(have):
        out[j] = _whole(vals[j], field, name_of(int(where[j])), path)
    return out


_POLYGON = 3  # shapely.GeometryType.POLYGON


def build_modules(gdf, spec, module_spec=None, path: Path | str = "layout"):
    """Turn layout features (already in a projected CRS [m]) into the modules GeoDataFrame.

    Works on whole columns (shapely 2 array functions, numpy): tables are split and frames
    built for all features at once; only features that need repair go one by one.

    Parameters
    ----------
    gdf : geopandas.GeoDataFrame
        Layout features in the target CRS.
    spec : LayoutSpec
        Array facts (rows, cols, orientation, gap, tilt, azimuth).
    module_spec : ModuleSpec, optional
        Used to warn when footprints disagree with the datasheet.
    path : path-like
        Named in messages.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns module_id, table_id, string_id, string_index, combiner_id, inverter_id
        (text ids, None when the layout does not give them), table_row, table_col, geometry,
        fx0, fy0, fux, fuy, fvx, fvy, lower_edge, source_feature.

    Raises
    ------
    LayoutError
        Empty, non-polygon or unsplittable features and duplicate module ids, by feature id
        (the first bad feature in file order).
    """
    import geopandas as gpd

    path = Path(path)
    # GIS field names (Shapefile-truncated, other case, variants) -> the names used below
    fields, field_notes = layout_fields(gdf.columns)
    gdf = gdf.rename(columns={src: f"__{prop}" for prop, src in fields.items()})
    gdf = gdf.rename(columns={f"__{prop}": prop for prop in fields})
    n = len(gdf)
    geoms = np.asarray(gdf.geometry.to_numpy(), dtype=object)
    every = np.arange(n)

    def name_of(k: int) -> str:
        return _feature_name(gdf.iloc[k], k)

    def ints(prop: str, vals, have, where=every):
        return _ints(vals, have, fields.get(prop, prop), where, name_of, path)

    # --- properties, whole columns
    rows_v, rows_h = _column(gdf, "rows")
    cols_v, cols_h = _column(gdf, "cols")
    rows_v, cols_v = ints("rows", rows_v, rows_h), ints("cols", cols_v, cols_h)
    mid_v, mid_h = _column(gdf, "module_id")
    mid_h = mid_h & np.array([_ident(v) is not None for v in mid_v], bool)
    is_table = (rows_h & cols_h) | (~mid_h & (spec.rows is not None and spec.cols is not None))
    n_tables = np.cumsum(is_table)
    ti = np.flatnonzero(is_table)
    t_rows = np.array([int(v) if h else int(spec.rows) for v, h in zip(rows_v[ti], rows_h[ti])], np.int64)
    t_cols = np.array([int(v) if h else int(spec.cols) for v, h in zip(cols_v[ti], cols_h[ti])], np.int64)
    orient_v, orient_h = _column(gdf, "orientation")
    t_orient = np.array([str(v) if h else str(spec.orientation) for v, h in zip(orient_v[ti], orient_h[ti])],
                        dtype=object)
    # errors that do not depend on the geometry, by feature
    pre_err: dict[int, str] = {}
    for j in np.flatnonzero((t_rows < 1) | (t_cols < 1))[::-1]:
        pre_err[int(ti[j])] = "rows and cols must be at least 1"
    for j in np.flatnonzero((t_rows >= 1) & (t_cols >= 1) & ~np.isin(t_orient, ["portrait", "landscape"])):
        pre_err.setdefault(int(ti[j]), f"orientation {t_orient[j]!r} is not portrait or landscape")
    first_pre = min(pre_err) if pre_err else n

    # --- geometries: plain valid polygons as they are; the rest repaired or refused in file order
    polys = geoms.copy()
    missing = shapely.is_missing(geoms)
    problem = missing.copy()
    ok_g = ~missing
    problem[ok_g] = (shapely.is_empty(geoms[ok_g]) | shapely.has_z(geoms[ok_g])
                     | (shapely.get_type_id(geoms[ok_g]) != _POLYGON) | ~shapely.is_valid(geoms[ok_g])
                     | ~(shapely.area(geoms[ok_g]) > 0))
    geom_err: LayoutError | None = None
    first_geom = n
    for k in np.flatnonzero(problem).tolist():
        if k > first_pre:
            break
        try:
            polys[k] = _as_polygon(geoms[k], name_of(int(k)), path)
        except LayoutError as exc:  # raised below unless an earlier feature fails
            geom_err, first_geom = exc, int(k)
            break

    # --- tables: split all at once
    t_ok = np.array([int(k) not in pre_err for k in ti], bool)
    split, split_err = _split_tables(polys[ti[t_ok]], t_rows[t_ok], t_cols[t_ok], t_orient[t_ok] == "portrait",
                                     spec.gap_m, spec.tilt_deg, spec.azimuth_deg)
    errors = dict(pre_err)
    tio = ti[t_ok]
    for j, msg in split_err.items():
        errors.setdefault(int(tio[j]), msg)
    # --- loose module polygons: frames all at once
    li = np.flatnonzero(~is_table)
    l_frames, l_lower, l_ok = _frames_from_polygons(polys[li], spec.azimuth_deg)
    for j in np.flatnonzero(~l_ok):
        errors.setdefault(int(li[j]), "degenerate footprint")
    k = min(errors) if errors else int(n)
    if geom_err is not None and first_geom <= k:
        raise geom_err
    if errors:
        raise LayoutError(f"{path}: {name_of(k)}: {errors[k]}")

    # --- assemble in file order: a table's modules row by row, col by col
    count = np.ones(n, np.int64)
    count[ti] = t_rows * t_cols
    offset = np.cumsum(count) - count
    total = int(count.sum())
    t_pos = offset[ti][split["table"]] + (np.arange(len(split["table"]))
                                          - (np.cumsum(count[ti]) - count[ti])[split["table"]])
    l_pos = offset[li]
    source = np.repeat(np.arange(n), count)

    def column(table_vals, loose_vals):
        out = np.full(total, None, dtype=object)
        out[t_pos] = table_vals
        out[l_pos] = loose_vals
        return out

    tid_v, tid_h = _column(gdf, "table_id")
    sid_v, sid_h = _column(gdf, "string_id")
    table_ids = np.array([(_ident(v) if h else None) or f"T{c:04d}"
                          for v, h, c in zip(tid_v[ti], tid_h[ti], n_tables[ti])], dtype=object)
    table_sid = _strs(sid_v[ti], sid_h[ti])
    tt = split["table"]
    t_table = table_ids[tt]
    t_mid = np.array([f"{a}-R{r}-C{c:02d}" for a, r, c in zip(t_table, split["row"], split["col"])], dtype=object)
    sidx_v, sidx_h = _column(gdf, "string_index")
    trow_v, trow_h = _column(gdf, "table_row")
    tcol_v, tcol_h = _column(gdf, "table_col")
    frames = np.empty((total, 6))
    frames[t_pos] = split["frames"]
    frames[l_pos] = l_frames
    geometry = column(split["geometry"], polys[li])
    df = pd.DataFrame({
        "module_id": column(t_mid, _strs(mid_v[li], mid_h[li])),
        "table_id": column(t_table, _strs(tid_v[li], tid_h[li])),
        "string_id": column(table_sid[tt], _strs(sid_v[li], sid_h[li])),
        "string_index": column(np.full(len(tt), None, dtype=object), ints("string_index", sidx_v[li], sidx_h[li], li)),
        **{prop: column(_strs(vals[ti], have[ti])[tt], _strs(vals[li], have[li]))
           for prop, (vals, have) in ((p, _column(gdf, p)) for p in ELECTRICAL_IDS)},
        "table_row": column(split["row"].astype(object), ints("table_row", trow_v[li], trow_h[li], li)),
        "table_col": column(split["col"].astype(object), ints("table_col", tcol_v[li], tcol_h[li], li)),
    })
    for j, name in enumerate(FRAME_COLUMNS):
        df[name] = frames[:, j]
    df["lower_edge"] = column(split["lower_edge"], l_lower)
    df["source_feature"] = source
    # ids for loose modules, in file order
    no_id = l_pos[~mid_h[li]]
    if no_id.size:
        df.loc[no_id, "module_id"] = [f"M{j + 1:05d}" for j in range(no_id.size)]
    dup = df["module_id"][df["module_id"].duplicated()]
    if len(dup):
        raise LayoutError(f"{path}: module_id {dup.iloc[0]} appears more than once")
    # tables / rows / cols of loose modules
    if li.size:
        sub = df.loc[l_pos]
        need_group = sub["table_id"].isna().any() or sub["table_row"].isna().any() or sub["table_col"].isna().any()
        if need_group:
            gap_tol = max(3 * spec.gap_m, 0.15)
            groups = _group_tables(polys[li], gap_tol)
            g_rows, g_cols = _rows_cols_for_loose(sub, groups, spec.azimuth_deg)
            tid = sub["table_id"].isna().to_numpy()
            df.loc[l_pos[tid], "table_id"] = [f"G{g + 1:04d}" for g in groups[tid]]
            fill = sub["table_row"].isna().to_numpy()
            df.loc[l_pos[fill], "table_row"] = g_rows[fill]
            fill = sub["table_col"].isna().to_numpy()
            df.loc[l_pos[fill], "table_col"] = g_cols[fill]
    df["string_index"] = pd.array(df["string_index"].to_numpy(dtype=object), dtype="Int64")
    df["table_row"] = df["table_row"].astype(int)
    df["table_col"] = df["table_col"].astype(int)
    df = df[MODULE_COLUMNS].assign(
        geometry=geometry, **{c: df[c] for c in FRAME_COLUMNS + ["lower_edge", "source_feature"]})
    out = gpd.GeoDataFrame(df, geometry="geometry", crs=gdf.crs)
    if module_spec is not None:
        _check_sizes(out, module_spec, path)
    report: dict[str, Any] = {"file": str(path), "features": int(n), "tables": int(len(ti)), "modules": int(len(out)),
              "fields": {prop: str(src) for prop, src in sorted(fields.items())}}
    report.update(_strings_report(out, fields, path))
    for note in field_notes:
        log.info("%s: %s", path, note)
    for w in report["warnings"]:
        warnings.warn(w, LayoutWarning, stacklevel=2)
    out.attrs["layout"] = report
    return out


def _strings_report(modules, fields: dict, path: Path) -> dict:
    """How much of the electrical stringing the layout gives, and what is lost without it.

    Open strings and PID follow the modules of a string in order from its negative end,
    so they need both a string id and a position along the string for each module.

    Returns
    -------
    dict
        ``strings``: ``complete`` | ``partial`` | ``ids_only`` | ``positions_only`` | ``none``;
        ``n_strings``; ``warnings``: one line each, naming the field and what is lost.
    """
    sid = modules["string_id"].notna().to_numpy()
    pos = modules["string_index"].notna().to_numpy()
    n_strings = int(modules.loc[sid, "string_id"].nunique())
    fid = fields.get("string_id", "string_id")
    fpos = fields.get("string_index", "string_index")
    known = ", ".join(n for n in ("string_ind", *FIELD_NAMES["string_index"][1:4]))
    out: dict = {"n_strings": n_strings, "warnings": []}
    if not sid.any() and not pos.any():
        out["strings"] = "none"
        return out
    if sid.any() and not pos.any():
        out["strings"] = "ids_only"
        out["warnings"].append(
            f"{path}: field {fid} gives {n_strings} string id{'s' if n_strings != 1 else ''} but no field "
            "gives the modules' "
            f"positions along their strings (string_index, also read as {known} ...): open strings "
            "and PID, which need both, are not looked for")
        return out
    if pos.any() and not sid.any():
        out["strings"] = "positions_only"
        out["warnings"].append(
            f"{path}: field {fpos} gives positions along strings but no field gives string ids "
            "(string_id): PID, which needs both, is not looked for, and open strings only along "
            "table rows")
        return out
    lone = int(np.count_nonzero(sid != pos))
    dup = modules.loc[sid & pos].duplicated(subset=["string_id", "string_index"], keep=False)
    bad_strings = int(modules.loc[sid & pos].loc[dup.to_numpy(), "string_id"].nunique())
    out["strings"] = "complete" if lone == 0 and bad_strings == 0 else "partial"
    if lone:
        out["warnings"].append(
            f"{path}: {lone} of {len(modules)} modules have a string id ({fid}) or a string "
            f"position ({fpos}) but not both: they are left out of the open-string and PID checks")
    if bad_strings:
        out["warnings"].append(
            f"{path}: {bad_strings} string(s) give one position ({fpos}) to several modules: "
            "open strings and PID may be judged on a wrong module order there")
    return out


def _check_sizes(modules, module_spec, path):
    lu = np.hypot(modules["fux"], modules["fuy"])
    lv = np.hypot(modules["fvx"], modules["fvy"])
    # from above a tilted module looks shorter along the slope; accept 0.3..1.3 of the datasheet
    med_l = float(np.median(lu))
    med_w = float(np.median(lv))
    if not (0.3 * module_spec.length_m <= med_l <= 1.3 * module_spec.length_m) or not (
        0.3 * module_spec.width_m <= med_w <= 1.3 * module_spec.width_m
    ):
        warnings.warn(
            f"{path}: median footprint {med_l:.2f} x {med_w:.2f} m does not fit the datasheet "
            f"{module_spec.length_m} x {module_spec.width_m} m; check the layout's units and CRS",
            LayoutWarning, stacklevel=2)


def read_layout(flight_or_path, crs, spec=None, module_spec=None):
    """Read a layout file and return the modules GeoDataFrame in ``crs``.

    Parameters
    ----------
    flight_or_path : Flight or path-like
        A :class:`pvscan.io.manifest.Flight` (its layout path, layout and module specs are
        used) or a path to the layout file (then give ``spec``).
    crs : pyproj.CRS or str
        Target CRS: the orthomosaic's (projected, metres).
    spec : LayoutSpec, optional
        Array facts when a path is given.
    module_spec : ModuleSpec, optional

    Returns
    -------
    geopandas.GeoDataFrame
        See :func:`build_modules`.
    """
    from pyproj import CRS

    from pvscan.io.manifest import LayoutSpec

    if hasattr(flight_or_path, "flight"):
        flight = flight_or_path
        path = Path(flight.flight.layout)
        spec = flight.layout
        module_spec = flight.module
    else:
        path = Path(flight_or_path)
        spec = spec or LayoutSpec()
    gdf = _read_file(path)
    target = CRS.from_user_input(crs)
    if not target.is_projected:
        raise LayoutError(f"{path}: target CRS {target.name} is not projected; the ortho must be in metres")
    try:
        gdf = gdf.to_crs(target)
    except Exception as exc:
        raise LayoutError(f"{path}: cannot reproject the layout to {target.name}: {exc}") from None
    return build_modules(gdf, spec, module_spec, path)
