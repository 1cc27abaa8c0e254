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
MODULE_COLUMNS = ["module_id", "table_id", "string_id", "string_index", "table_row", "table_col"]


class LayoutWarning(PvscanWarning):
    """A layout feature was repaired or looks inconsistent with the datasheet."""


# ----------------------------------------------------------------------------- frames
def _facing_vector(azimuth_deg: float) -> np.ndarray:
    """Unit vector (east, north) of the direction the modules face [-]."""
    a = math.radians(azimuth_deg)
    return np.array([math.sin(a), math.cos(a)])


def _rect_axes(poly: Polygon) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centre and the two full-length side vectors of the minimum rotated rectangle."""
    # Rotating calipers over the convex hull's edges: the minimum-area bounding rectangle
    # (computed about a local origin, so map coordinates of 1e6 m keep sub-micrometre precision).
    hull = np.asarray(poly.convex_hull.exterior.coords)
    if len(hull) < 4:
        raise ValueError("degenerate footprint")
    ref = hull[0].copy()
    pts = hull - ref
    edges = np.diff(pts, axis=0)
    lens = np.hypot(edges[:, 0], edges[:, 1])
    keep = lens > 1e-12
    dirs = edges[keep] / lens[keep, None]
    best = None
    for d in dirs:
        n = np.array([-d[1], d[0]])
        a = pts @ d
        b = pts @ n
        area = np.ptp(a) * np.ptp(b)
        if best is None or area < best[0] - 1e-12:
            best = (area, d, n, a.min(), a.max(), b.min(), b.max())
    area, d, n, a0, a1, b0, b1 = best
    if area <= 0:
        raise ValueError("degenerate footprint")
    centre = ref + d * (a0 + a1) / 2 + n * (b0 + b1) / 2
    return centre, d * (a1 - a0), n * (b1 - b0)


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
    U = np.asarray(long_vec, float)
    V = np.asarray(short_vec, float)
    f = _facing_vector(azimuth_deg) if facing is None else np.asarray(facing, float)
    if abs(U @ f) / np.hypot(*U) >= abs(V @ f) / np.hypot(*V):
        lower = "u"
        if U @ f > 0:  # u = 0 at the lower edge: U points away from the facing direction
            U = -U
        if U[0] * V[1] - U[1] * V[0] < 0:
            V = -V
    else:
        lower = "v"
        if V @ f > 0:
            V = -V
        if U[0] * V[1] - U[1] * V[0] < 0:
            U = -U
    o = np.asarray(centre, float) - U / 2 - V / 2
    return (o[0], o[1], U[0], U[1], V[0], V[1], lower)


def frame_from_polygon(poly: Polygon, azimuth_deg: float):
    """Module-local frame of a module footprint (its minimum rotated rectangle)."""
    centre, e1, e2 = _rect_axes(poly)
    if np.hypot(*e1) >= np.hypot(*e2):
        return frame_from_axes(centre, e1, e2, azimuth_deg)
    return frame_from_axes(centre, e2, e1, azimuth_deg)


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
    from shapely.geometry import shape

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
    crs = "EPSG:4326"  # RFC 7946: GeoJSON is WGS84 lon/lat
    legacy = doc.get("crs")
    if isinstance(legacy, dict):
        name = (legacy.get("properties") or {}).get("name")
        if name:
            from pyproj import CRS

            try:
                crs = CRS.from_user_input(name)
            except Exception:
                raise LayoutError(f"{path}: crs member {name!r} is not a known coordinate reference system") from None
    props, geoms = [], []
    for k, feat in enumerate(doc["features"]):
        if not isinstance(feat, dict) or feat.get("type") != "Feature":
            raise LayoutError(f"{path}: feature #{k + 1}: not a GeoJSON Feature")
        props.append(dict(feat.get("properties") or {}))
        g = feat.get("geometry")
        try:
            geoms.append(shape(g) if g else None)
        except Exception as exc:
            name = _feature_name(pd.Series(props[-1], dtype=object), k)
            raise LayoutError(f"{path}: {name}: invalid geometry: {exc}") from None
    return gpd.GeoDataFrame(pd.DataFrame(props, dtype=object) if props else None, geometry=geoms, crs=crs)


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


def _eastward(vec: np.ndarray) -> np.ndarray:
    """Orient a table axis toward increasing easting, or northing for north-south tables."""
    vec = np.asarray(vec, float)
    if abs(vec[0]) <= math.sin(_NS_TOLERANCE) * np.hypot(*vec):
        return vec if vec[1] >= 0 else -vec
    return vec if vec[0] > 0 else -vec


def _table_axes(poly: Polygon, azimuth_deg: float):
    """Centre, long-axis vector A (pointing to increasing easting) and across vector B (away
    from the facing direction, so row 1 is the lower row) of a table's rectangle."""
    centre, e1, e2 = _rect_axes(poly)
    A, B = (e1, e2) if np.hypot(*e1) >= np.hypot(*e2) else (e2, e1)
    A = _eastward(A)
    f = _facing_vector(azimuth_deg)
    if B @ f > 0:
        B = -B
    return centre, A, B


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
    centre, A, B = _table_axes(poly, azimuth_deg)
    L = np.hypot(*A)
    W = np.hypot(*B)
    a = A / L
    b = B / W
    gap_b = gap_m * math.cos(math.radians(tilt_deg))
    mod_a = (L - (cols - 1) * gap_m) / cols
    mod_b = (W - (rows - 1) * gap_b) / rows
    if mod_a <= 0 or mod_b <= 0:
        raise ValueError(f"table of {L:.2f} x {W:.2f} m cannot hold {rows} x {cols} modules with {gap_m} m gaps")
    corner = centre - A / 2 - B / 2  # lower row, col 1 corner
    out = []
    for r in range(rows):
        for c in range(cols):
            o = corner + a * c * (mod_a + gap_m) + b * r * (mod_b + gap_b)
            va = a * mod_a
            vb = b * mod_b
            pts = [o, o + va, o + va + vb, o + vb]
            p = Polygon(pts)
            if not p.exterior.is_ccw:
                p = Polygon(pts[::-1])
            cen = o + va / 2 + vb / 2
            if orientation == "portrait":
                long_vec, short_vec = vb, va
            else:
                long_vec, short_vec = va, vb
            out.append((r + 1, c + 1, p, frame_from_axes(cen, long_vec, short_vec, azimuth_deg, facing=-b)))
    return out


def _group_tables(polys: list[Polygon], tol: float) -> np.ndarray:
    """Connected components of footprints closer than ``tol`` [m] (loose module layouts)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    tree = shapely.STRtree(polys)
    left, right = tree.query(polys, predicate="dwithin", distance=tol)
    n = len(polys)
    graph = coo_matrix((np.ones(len(left)), (left, right)), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    # renumber by first member, so ids follow file order
    first = {}
    for i, lab in enumerate(labels):
        first.setdefault(lab, len(first))
    return np.array([first[lab] for lab in labels])


def _rank_positions(values: np.ndarray, tol: float) -> np.ndarray:
    """1-based rank of clustered 1-D positions (values closer than tol share a rank)."""
    order = np.argsort(values, kind="stable")
    ranks = np.empty(len(values), int)
    r = 1
    prev = None
    for k in order:
        if prev is not None and values[k] - prev > tol:
            r += 1
        ranks[k] = r
        prev = values[k]
    return ranks


def _rows_cols_for_loose(df: pd.DataFrame, groups: np.ndarray, azimuth_deg: float):
    """table_row/table_col of loose modules from their positions within each group."""
    rows = np.ones(len(df), int)
    cols = np.ones(len(df), int)
    cx = df["fx0"] + 0.5 * df["fux"] + 0.5 * df["fvx"]
    cy = df["fy0"] + 0.5 * df["fuy"] + 0.5 * df["fvy"]
    centres = np.column_stack([cx, cy])
    f = _facing_vector(azimuth_deg)
    for g in np.unique(groups):
        idx = np.flatnonzero(groups == g)
        if len(idx) == 1:
            continue
        first = idx[0]
        U = np.array([df["fux"].iloc[first], df["fuy"].iloc[first]])
        V = np.array([df["fvx"].iloc[first], df["fvy"].iloc[first]])
        pts = centres[idx]
        # table long axis: the module axis along which the centres spread the most
        spread_u = np.ptp(pts @ (U / np.hypot(*U)))
        spread_v = np.ptp(pts @ (V / np.hypot(*V)))
        axis = U if spread_u > spread_v else V
        across = V if axis is U else U
        a = axis / np.hypot(*axis)
        a = _eastward(a)
        b = across / np.hypot(*across)
        if b @ f > 0:
            b = -b
        pa = pts @ a
        pb = pts @ b
        cols[idx] = _rank_positions(pa, 0.5 * min(np.hypot(*U), np.hypot(*V)))
        rows[idx] = _rank_positions(pb, 0.5 * min(np.hypot(*U), np.hypot(*V)))
    return rows, cols


def build_modules(gdf, spec, module_spec=None, path: Path | str = "layout"):
    """Turn layout features (already in a projected CRS [m]) into the modules GeoDataFrame.

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
        Columns module_id, table_id, string_id, string_index, table_row, table_col, geometry,
        fx0, fy0, fux, fuy, fvx, fvy, lower_edge, source_feature.

    Raises
    ------
    LayoutError
        Empty, non-polygon or unsplittable features and duplicate module ids, by feature id.
    """
    import geopandas as gpd

    path = Path(path)
    fields, field_notes = layout_fields(gdf.columns)
    gdf = gdf.rename(columns={src: f"__{prop}" for prop, src in fields.items()})
    gdf = gdf.rename(columns={f"__{prop}": prop for prop in fields})
    records = []
    loose = []
    n_tables = 0
    for k, (_, row) in enumerate(gdf.iterrows()):
        name = _feature_name(row, k)
        poly = _as_polygon(row.geometry, name, path)
        rows_p = _whole(_prop(row, "rows"), fields.get("rows", "rows"), name, path)
        cols_p = _whole(_prop(row, "cols"), fields.get("cols", "cols"), name, path)
        has_mid = _ident(_prop(row, "module_id")) is not None
        is_table = (rows_p is not None and cols_p is not None) or (
            not has_mid and spec.rows is not None and spec.cols is not None
        )
        if is_table:
            n_tables += 1
            rows = int(rows_p if rows_p is not None else spec.rows)
            cols = int(cols_p if cols_p is not None else spec.cols)
            if rows < 1 or cols < 1:
                raise LayoutError(f"{path}: {name}: rows and cols must be at least 1")
            orientation = str(_prop(row, "orientation", default=spec.orientation))
            if orientation not in ("portrait", "landscape"):
                raise LayoutError(f"{path}: {name}: orientation {orientation!r} is not portrait or landscape")
            table_id = _ident(_prop(row, "table_id")) or f"T{n_tables:04d}"
            string_id = _ident(_prop(row, "string_id"))
            try:
                parts = split_table(poly, rows, cols, orientation, spec.gap_m, spec.tilt_deg, spec.azimuth_deg)
            except ValueError as exc:
                raise LayoutError(f"{path}: {name}: {exc}") from None
            for r, c, p, fr in parts:
                records.append({
                    "module_id": f"{table_id}-R{r}-C{c:02d}",
                    "table_id": table_id,
                    "string_id": string_id,
                    "string_index": None,
                    "table_row": r,
                    "table_col": c,
                    "geometry": p,
                    **dict(zip(FRAME_COLUMNS + ["lower_edge"], fr)),
                    "source_feature": k,
                })
        else:
            try:
                fr = frame_from_polygon(poly, spec.azimuth_deg)
            except ValueError:
                raise LayoutError(f"{path}: {name}: degenerate footprint") from None
            rec = {
                "module_id": _ident(_prop(row, "module_id")),
                "table_id": _ident(_prop(row, "table_id")),
                "string_id": _ident(_prop(row, "string_id")),
                "string_index": _whole(_prop(row, "string_index"), fields.get("string_index", "string_index"),
                                       name, path),
                "table_row": _whole(_prop(row, "table_row"), fields.get("table_row", "table_row"), name, path),
                "table_col": _whole(_prop(row, "table_col"), fields.get("table_col", "table_col"), name, path),
                "geometry": poly,
                **dict(zip(FRAME_COLUMNS + ["lower_edge"], fr)),
                "source_feature": k,
            }
            loose.append(len(records))
            records.append(rec)

    df = pd.DataFrame.from_records(records)
    # ids for loose modules
    n_loose = 0
    for i in loose:
        if df.at[i, "module_id"] is None:
            n_loose += 1
            df.at[i, "module_id"] = f"M{n_loose:05d}"
    dup = df["module_id"][df["module_id"].duplicated()]
    if len(dup):
        raise LayoutError(f"{path}: module_id {dup.iloc[0]} appears more than once")
    # tables / rows / cols of loose modules
    if loose:
        sub = df.loc[loose]
        need_group = sub["table_id"].isna().any() or sub["table_row"].isna().any() or sub["table_col"].isna().any()
        if need_group:
            polys = list(sub.geometry)
            gap_tol = max(3 * spec.gap_m, 0.15)
            groups = _group_tables(polys, gap_tol)
            rows, cols = _rows_cols_for_loose(sub, groups, spec.azimuth_deg)
            for j, i in enumerate(loose):
                if df.at[i, "table_id"] is None:
                    df.at[i, "table_id"] = f"G{groups[j] + 1:04d}"
                if pd.isna(df.at[i, "table_row"]):
                    df.at[i, "table_row"] = rows[j]
                if pd.isna(df.at[i, "table_col"]):
                    df.at[i, "table_col"] = cols[j]
    df["string_index"] = df["string_index"].astype("Int64")
    df["table_row"] = df["table_row"].astype(int)
    df["table_col"] = df["table_col"].astype(int)
    out = gpd.GeoDataFrame(df, geometry="geometry", crs=gdf.crs)
    if module_spec is not None:
        _check_sizes(out, module_spec, path)
    report = {"file": str(path), "features": int(len(gdf)), "tables": int(n_tables), "modules": int(len(out)),
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
