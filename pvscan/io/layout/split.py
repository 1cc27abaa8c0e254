"""Tables split into module footprints, and loose modules grouped into tables, rows and columns."""
from __future__ import annotations

import math
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import shapely
from numpy.typing import ArrayLike
from shapely.geometry import Polygon

from pvscan.errors import LayoutError, LayoutWarning
from pvscan.io.layout.frames import (
    FRAME_COLUMNS,
    Frame,
    Polygons,
    _dot,
    _facing_vector,
    _frames_from_axes,
    _rect_axes_many,
)

__all__ = ["split_table"]

def _as_polygon(geom: Any, name: str, path: Path) -> Polygon:
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
    # A ring drawn on one line gets a sliver of area from reprojection and rounding; below
    # 1e-6 of the squared outline (a strip a few micrometres wide per metre of outline) a
    # polygon has no area at any survey precision (numerical zero, not a tuned threshold).
    if geom.area <= 1e-6 * geom.length**2:
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


def _table_axes_many(polys: Polygons, azimuth_deg: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Centres, long-axis vectors A (toward increasing easting), across vectors B (away from
    the facing direction, so row 1 is the lower row) and ok flags of n table rectangles."""
    centre, e1, e2, ok = _rect_axes_many(polys)
    first_long = np.hypot(e1[:, 0], e1[:, 1]) >= np.hypot(e2[:, 0], e2[:, 1])
    A = _eastward_many(np.where(first_long[:, None], e1, e2))
    B = np.where(first_long[:, None], e2, e1)
    flip = _dot(B, _facing_vector(azimuth_deg)) > 0
    B[flip] = -B[flip]
    return centre, A, B, ok


def _split_tables(polys: Polygons, rows: ArrayLike, cols: ArrayLike, portrait: ArrayLike, gap_m: float,
                  tilt_deg: float, azimuth_deg: float) -> tuple[dict[str, np.ndarray], dict[int, str]]:
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
                tilt_deg: float, azimuth_deg: float) -> list[tuple[int, int, Polygon, Frame]]:
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


def _group_tables(polys: Polygons, tol: float) -> np.ndarray:
    """Connected components of footprints closer than ``tol`` [m] (loose module layouts),
    numbered by their first member, so ids follow file order."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    polys = np.asarray(polys, dtype=object)
    tree = shapely.STRtree(polys)
    # the pairs whose envelopes come within tol (one tree query of grown boxes), then the
    # distance test on those pairs in one vectorised call: the pairs the tree's own
    # "dwithin" query returns, in about half the time (the order differs; the components
    # and their numbering by first member do not depend on it)
    b = shapely.bounds(polys)
    grown = shapely.box(b[:, 0] - tol, b[:, 1] - tol, b[:, 2] + tol, b[:, 3] + tol)
    left, right = tree.query(grown)
    near = shapely.dwithin(polys[left], polys[right], tol)
    left, right = left[near], right[near]
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


def _rows_cols_for_loose(df: pd.DataFrame, groups: np.ndarray, azimuth_deg: float) -> tuple[np.ndarray, np.ndarray]:
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
