"""Module and anomaly geometry placed on the thermal image.

Result files keep the layout's own positions (CONTRACT.md); the image shows the plant where
the registration found it. :func:`registration_transform` turns what ``summary.json``
recorded into a function that moves layout coordinates onto the image, and
:class:`MapGeometry` holds every module and anomaly region so placed, in the ortho CRS.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
import pandas as pd

from pvscan.report._result import ResultData, get_path
from pvscan.report._text import isnum

__all__ = ["MapGeometry", "registration_transform", "as_list", "cell_lines"]

Transform = Callable[[np.ndarray], np.ndarray]


def as_list(v: Any) -> list[str]:
    """Module ids of a ``module_ids`` value (list, JSON-ish or ``;``/``,`` separated text)."""
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return []
    if isinstance(v, (list, tuple, np.ndarray)):
        return [str(x) for x in v]
    if isinstance(v, str) and v.strip():
        s = v.strip().strip("[]")
        return [p.strip().strip("'\"") for p in s.replace(";", ",").split(",") if p.strip()]
    return []


def _pair(v: Any) -> tuple[float, float] | None:
    try:
        a, b = float(v[0]), float(v[1])
    except (TypeError, ValueError, IndexError, KeyError):
        return None
    return (a, b) if math.isfinite(a) and math.isfinite(b) else None


def registration_transform(summary: Mapping[str, Any], default_centre: tuple[float, float] | None = None
                           ) -> tuple[Transform, dict[str, tuple[float, float]]]:
    """The layout-to-image placement recorded in ``summary.json``.

    Read, in this order of preference:

    * ``registration.affine``: six numbers ``[a, b, d, e, xoff, yoff]`` (x' = a x + b y + xoff,
      y' = d x + e y + yoff, map metres), the whole fitted placement;
    * else a similarity about a centre [m]: scale [-] (1 = none) and rotation [deg,
      counter-clockwise], followed by a shift [m] (east, north), read from
      ``registration.placement`` (``shift_m``, ``rotation_deg``, ``scale``, ``centre``) when
      recorded, else from ``registration`` (``rotation_deg``, ``scale``, ``centre_m``) and
      ``layout_shift_m``;
    * per-table refinements after the global fit: ``registration.tables`` as a list of
      ``{table_id, dx_m, dy_m}`` (or ``shift_m: [dx, dy]``) or a mapping ``table_id -> [dx, dy]``.

    Absent keys mean no correction of that kind. A rotation or scale without a recorded centre
    turns about ``default_centre`` (the layout's centre) [m].

    Returns
    -------
    (transform, table_shifts)
        ``transform(xy)`` maps an (n, 2) array of layout coordinates to image coordinates;
        ``table_shifts`` maps a table id to its extra shift [m].
    """
    reg = summary.get("registration") if isinstance(summary.get("registration"), Mapping) else {}
    assert isinstance(reg, Mapping)
    aff = reg.get("affine")
    transform: Transform
    if isinstance(aff, (list, tuple)) and len(aff) == 6 and all(isnum(v) for v in aff):
        a, b, d, e, xo, yo = (float(v) for v in aff)
        mat = np.array([[a, d], [b, e]])
        off = np.array([xo, yo])

        def transform(xy: np.ndarray) -> np.ndarray:
            return xy @ mat + off
    else:
        place = reg.get("placement") if isinstance(reg.get("placement"), Mapping) else {}
        assert isinstance(place, Mapping)
        shift = _pair(place.get("shift_m")) or _pair(get_path(
            summary, "layout_shift_m", "registration.shift_m", "registration.layout_shift_m", default=None)) \
            or (0.0, 0.0)
        src = place if place else reg
        rot = float(src["rotation_deg"]) if isnum(src.get("rotation_deg")) else 0.0
        scale = float(src["scale"]) if isnum(src.get("scale")) and float(src["scale"]) > 0 else 1.0
        centre = _pair(src.get("centre", src.get("centre_m", src.get("origin_m")))) or default_centre
        th = math.radians(rot)
        rmat = scale * np.array([[math.cos(th), math.sin(th)], [-math.sin(th), math.cos(th)]])
        sh = np.array(shift)
        if centre is None or (rot == 0.0 and scale == 1.0):
            def transform(xy: np.ndarray) -> np.ndarray:
                return xy + sh if (rot == 0.0 and scale == 1.0) else xy @ rmat + sh
        else:
            c = np.array(centre)

            def transform(xy: np.ndarray) -> np.ndarray:
                return (xy - c) @ rmat + c + sh
    tables: dict[str, tuple[float, float]] = {}
    raw = reg.get("tables")
    if isinstance(raw, Mapping):
        for k, v in raw.items():
            p = _pair(v) if not isinstance(v, Mapping) else _pair((v.get("dx_m"), v.get("dy_m")))
            if p:
                tables[str(k)] = p
    elif isinstance(raw, list):
        for item in raw:
            if isinstance(item, Mapping) and item.get("table_id") is not None:
                p = _pair(item.get("shift_m")) or _pair((item.get("dx_m"), item.get("dy_m")))
                if p:
                    tables[str(item["table_id"])] = p
    return transform, tables


def _place(geoms: np.ndarray, transform: Transform, extra: np.ndarray | None = None) -> np.ndarray:
    """Geometries moved by ``transform`` (then by their own ``extra`` shift, rows of (dx, dy))."""
    import shapely

    if len(geoms) == 0:
        return geoms
    out = shapely.transform(geoms, transform)
    if extra is not None and np.any(extra):
        out = np.array([shapely.transform(g, lambda c, d=d: c + d) if d.any() else g
                        for g, d in zip(out, extra)], dtype=object)
    return out


class MapGeometry:
    """Module and anomaly geometries in the ortho (map) CRS, placed on the image (the
    registration of summary.json applied: :func:`registration_transform`)."""

    def __init__(self, data: ResultData, crs: Any, modules_gdf: Any = None):
        import geopandas as gpd
        from shapely import STRtree

        mods = data.modules
        n = len(mods)
        # the result's lon/lat outlines; the pipeline's own footprints (``modules_gdf``, as
        # drawn) stand in for every module they hold, so only the others are reprojected
        lonlat = np.empty(n, dtype=object)
        if n:
            lonlat[:] = list(mods["geometry"])
        if crs is None:
            crs = gpd.GeoSeries(lonlat, crs="EPSG:4326").estimate_utm_crs() if n else "EPSG:3857"
        self.crs = crs
        ids = mods["module_id"].tolist() if n else []
        placed = np.empty(n, dtype=object)
        todo = np.ones(n, dtype=bool)
        if modules_gdf is not None and len(modules_gdf) and "module_id" in modules_gdf:
            gdf = modules_gdf if modules_gdf.crs is None else modules_gdf.to_crs(crs)
            own = dict(zip(gdf["module_id"].astype(str).tolist(), np.asarray(gdf.geometry.to_numpy(), dtype=object)))
            for i, mid in enumerate(ids):
                if mid in own:
                    placed[i] = own[mid]
                    todo[i] = False
        if todo.any():
            placed[todo] = gpd.GeoSeries(lonlat[todo], crs="EPSG:4326").to_crs(crs).to_numpy()
        geo = gpd.GeoSeries(placed, crs=crs)

        centre = None
        if n:
            b = geo.total_bounds
            centre = (0.5 * (b[0] + b[2]), 0.5 * (b[1] + b[3]))
        transform, tables = registration_transform(data.summary, centre)

        def table_shift(table_ids: pd.Series) -> np.ndarray | None:
            if not tables:
                return None
            return np.array([tables.get(str(t), (0.0, 0.0)) for t in table_ids.tolist()], dtype=float)

        mt = mods["table_id"] if "table_id" in mods else pd.Series([None] * n)
        self.modules = list(_place(placed, transform, table_shift(mt))) if n else []
        self.module_index = {mid: i for i, mid in enumerate(ids)}
        an = data.anomalies
        ageo = gpd.GeoSeries(list(an["geometry"]) if len(an) else [], crs="EPSG:4326")
        at = an["table_id"] if "table_id" in an else pd.Series([None] * len(an))
        self.anomalies = list(_place(ageo.to_crs(crs).to_numpy(), transform, table_shift(at))) if len(an) else []
        self.tree = STRtree(self.modules) if self.modules else None
        self._rings: Any = None

    @property
    def rings(self) -> Any:
        """The modules' outlines as :class:`pvscan.report._figures.Rings`, gathered on first
        use and shared by every figure that draws all modules."""
        if self._rings is None:
            from pvscan.report._figures import Rings

            self._rings = Rings(self.modules)
        return self._rings

    def module_geoms(self, row: pd.Series) -> list:
        ids = as_list(row.get("module_ids")) or [str(row.get("module_id"))]
        return [self.modules[self.module_index[m]] for m in ids if m in self.module_index]

    def near(self, box: tuple[float, float, float, float]) -> list:
        if self.tree is None:
            return []
        from shapely.geometry import box as _box

        idx = self.tree.query(_box(*box))
        return [self.modules[i] for i in sorted(int(i) for i in idx)]

    def bounds(self) -> tuple[float, float, float, float] | None:
        if not self.modules:
            return None
        import shapely

        geoms = np.asarray(self.modules, dtype=object)
        keep = ~shapely.is_missing(geoms)
        keep[keep] = ~shapely.is_empty(geoms[keep])
        b = shapely.bounds(geoms[keep])
        return (b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max())

    def north_deg(self) -> float:
        """True north, clockwise from map up at the site's centre [deg] (grid convergence)."""
        from pyproj import CRS, Transformer

        b = self.bounds()
        try:
            c = CRS.from_user_input(self.crs)
            if b is None or c.is_geographic:
                return 0.0
            fwd = Transformer.from_crs(c, "EPSG:4326", always_xy=True)
            inv = Transformer.from_crs("EPSG:4326", c, always_xy=True)
            x, y = 0.5 * (b[0] + b[2]), 0.5 * (b[1] + b[3])
            lon, lat = fwd.transform(x, y)
            x2, y2 = inv.transform(lon, lat + 0.001)
            return math.degrees(math.atan2(x2 - x, y2 - y))
        except Exception:  # an exotic CRS: grid north is as good a guess as any
            return 0.0


def cell_lines(module: Any, n_along: int, n_across: int) -> list:
    """The cell grid of a module as line segments (map coordinates): ``n_along`` cells along
    its long side, ``n_across`` across, on the module's oriented rectangle."""
    from shapely.geometry import LineString

    if module is None or module.is_empty or n_along < 1 or n_across < 1:
        return []
    rect = np.asarray(module.minimum_rotated_rectangle.exterior.coords)[:4]
    p0 = rect[0]
    e1, e2 = rect[1] - p0, rect[3] - p0
    if np.hypot(*e1) < np.hypot(*e2):
        e1, e2 = e2, e1  # e1 along the long side
    lines = [LineString([p0 + e1 * i / n_along, p0 + e1 * i / n_along + e2]) for i in range(1, n_along)]
    lines += [LineString([p0 + e2 * j / n_across, p0 + e2 * j / n_across + e1]) for j in range(1, n_across)]
    return lines
