"""Placements applied: the placement a block fit measured, a layout moved by a placement, and
the registration record of the placement used (split from :mod:`.fit`)."""
from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

from pvscan.measure.register._records import Registration
from pvscan.measure.register.evidence import Placement
from pvscan.measure.register.local import row_offsets, table_offsets

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

__all__ = ["placement_of", "apply_placement"]


def _centre(modules: gpd.GeoDataFrame) -> tuple[float, float]:
    return float(np.mean(modules.total_bounds[[0, 2]])), float(np.mean(modules.total_bounds[[1, 3]]))


def placement_of(reg: Registration, centre: tuple[float, float]) -> Placement | None:
    """The placement a block fit measured (its shift field, or its one measured shift)."""
    cx, cy = centre
    if reg.model is not None:
        tx, ty, a, b, x0, y0 = reg.model
        s = math.hypot(1.0 + a, b)
        th = math.degrees(math.atan2(b, 1.0 + a))
        sx = tx + a * (cx - x0) - b * (cy - y0)
        sy = ty + b * (cx - x0) + a * (cy - y0)
        return Placement(float(sx), float(sy), float(th), float(s), cx, cy)
    mx, my = reg.measured_m
    if math.isfinite(mx) and math.isfinite(my):
        return Placement(float(mx), float(my), 0.0, 1.0, cx, cy)
    return None


def apply_placement(modules: gpd.GeoDataFrame, placement: Placement | None) -> gpd.GeoDataFrame:
    """A copy of ``modules`` with footprints and module frames moved by ``placement``."""
    import geopandas
    import shapely

    out = modules.copy()
    if placement is None or placement.is_identity() or len(out) == 0:
        return out
    geoms = np.asarray(out.geometry.values, dtype=object)
    coords, idx = shapely.get_coordinates(geoms, return_index=True)
    x, y = placement.apply(coords[:, 0], coords[:, 1])
    local = table_offsets(out, {t: (dx, dy) for t, dx, dy in placement.tables}) + row_offsets(out, placement.rows)
    moved = shapely.set_coordinates(geoms.copy(), np.column_stack([x + local[idx, 0], y + local[idx, 1]]))
    out[out.geometry.name] = geopandas.GeoSeries(moved, index=out.index, crs=modules.crs)
    if "fx0" in out.columns:
        ox, oy = placement.apply(out["fx0"].to_numpy(float), out["fy0"].to_numpy(float))
        out["fx0"], out["fy0"] = ox + local[:, 0], oy + local[:, 1]
        m = placement.matrix
        for a, b in (("fux", "fuy"), ("fvx", "fvy")):
            if a in out.columns:
                ax, ay = out[a].to_numpy(float), out[b].to_numpy(float)
                out[a], out[b] = m[0, 0] * ax + m[0, 1] * ay, m[1, 0] * ax + m[1, 1] * ay
    return out


def _largest_gap(a: Placement, b: Placement, bounds: Any) -> float:
    """Largest distance between where two placements put the corners of ``bounds`` [m]."""
    xs = np.array([bounds[0], bounds[2], bounds[2], bounds[0]], float)
    ys = np.array([bounds[1], bounds[1], bounds[3], bounds[3]], float)
    ax, ay = a.apply(xs, ys)
    bx, by = b.apply(xs, ys)
    return float(np.max(np.hypot(ax - bx, ay - by)))


def _use_placement(reg: Registration, p: Placement, *, residuals: bool = True) -> None:
    """Record ``p`` as the placement applied to the layout (its shift at the site centre and,
    with ``residuals``, its rotation [deg] and scale)."""
    reg.placement = p
    reg.applied = True
    reg.model = p.shift_model()
    reg.follow_drift = True
    reg.shift_m = (p.tx, p.ty)
    if residuals:
        reg.residual_rotation_deg, reg.residual_scale = p.theta_deg, p.scale


def _no_move(reg: Registration) -> Registration:
    reg.applied = False
    reg.shift_m = (0.0, 0.0)
    reg.model = None
    return reg
