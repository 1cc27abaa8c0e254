"""Module-local frames: built from footprints (minimum rotated rectangles), and used to map
module-local ``(u, v)`` to map coordinates and back (see :mod:`pvscan.io.layout`)."""
from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

import numpy as np
import pandas as pd
import shapely
from numpy.typing import ArrayLike
from shapely.geometry import MultiPolygon, Polygon

#: Footprint polygons, as a numpy object array or any sequence.
Polygons = np.ndarray | Sequence[Polygon]
#: A module frame as plain values: fx0, fy0, fux, fuy, fvx, fvy [m] and lower_edge ("u" | "v").
Frame = tuple[float, float, float, float, float, float, str]

__all__ = ["FRAME_COLUMNS", "frame_from_axes", "frame_from_polygon", "uv_to_xy", "xy_to_uv", "region_polygon",
           "region_polygons"]

FRAME_COLUMNS = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]


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


def _rect_axes_many(polys: Polygons) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
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


def _frames_from_axes(centre: ArrayLike, long_vec: ArrayLike, short_vec: ArrayLike,
                      facing: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
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


def frame_from_axes(centre: ArrayLike, long_vec: ArrayLike, short_vec: ArrayLike, azimuth_deg: float,
                    facing: ArrayLike | None = None) -> Frame:
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


def _frames_from_polygons(polys: Polygons, azimuth_deg: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Frames (n, 6), ``lower_edge`` (n,) and ok (n,) of module footprints (minimum rotated rectangles)."""
    centre, e1, e2, ok = _rect_axes_many(polys)
    first_long = np.hypot(e1[:, 0], e1[:, 1]) >= np.hypot(e2[:, 0], e2[:, 1])
    long_vec = np.where(first_long[:, None], e1, e2)
    short_vec = np.where(first_long[:, None], e2, e1)
    fr, lower = _frames_from_axes(centre, long_vec, short_vec, _facing_vector(azimuth_deg))
    return fr, lower, ok


def frame_from_polygon(poly: Polygon, azimuth_deg: float) -> Frame:
    """Module-local frame of a module footprint (its minimum rotated rectangle)."""
    fr, lower, ok = _frames_from_polygons([poly], azimuth_deg)
    if not ok[0]:
        raise ValueError("degenerate footprint")
    return (*(float(x) for x in fr[0]), lower[0])


def uv_to_xy(modules: pd.DataFrame, idx: int | slice | ArrayLike, u: ArrayLike,
             v: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Map module-local (u, v) of module(s) ``idx`` to map coordinates [m]."""
    m = modules.iloc[idx] if not isinstance(idx, slice) else modules.iloc[idx]
    x = m["fx0"].to_numpy() + u * m["fux"].to_numpy() + v * m["fvx"].to_numpy()
    y = m["fy0"].to_numpy() + u * m["fuy"].to_numpy() + v * m["fvy"].to_numpy()
    return x, y


def xy_to_uv(frame: np.ndarray, x: ArrayLike, y: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
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


def region_polygons(modules: pd.DataFrame, i: int, boxes: Iterable[Sequence[float]]) -> Polygon | MultiPolygon:
    """Union of several (u0, u1, v0, v1) boxes of module ``i``."""
    polys = [region_polygon(modules, i, *b) for b in boxes]
    if len(polys) == 1:
        return polys[0]
    return shapely.union_all(polys)
