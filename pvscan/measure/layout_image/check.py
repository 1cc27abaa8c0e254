"""Hold an existing layout against the modules found in the image.

:func:`check_layout` matches the layout's modules to the detected ones table by table:
one shift common to the whole layout is measured first (the median offset of nearest
centroids; a drawing placed a little off is not a fault of every table), then each layout
table's own shift and turn against the detected modules it overlaps. Findings:

- ``missing_from_layout``: a detected module (status ok) no layout module matches;
- ``no_module_found``: a layout module with no detected module under it;
- ``table_moved``: a table whose own shift differs from the common one by more than
  ``check_move_m``; ``table_turned``: its axis differs by more than ``check_turn_deg``.

:func:`corrected_layout` gives the detected modules with the layout's ids and attributes
where a module was matched (module_id, table_id, string and electrical ids), and the
detector's ids for the others.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.spatial import cKDTree

__all__ = ["LayoutCheck", "check_layout", "corrected_layout", "KEEP_COLUMNS"]

#: Layout columns carried over to the corrected layout for matched modules.
KEEP_COLUMNS = ("module_id", "table_id", "string_id", "string_index", "combiner_id", "inverter_id")


@dataclass
class LayoutCheck:
    """The outcome of :func:`check_layout`.

    Attributes
    ----------
    match : ndarray (n_layout,) of int
        Detected module index matched to each layout module, -1 when none.
    common_shift_m : tuple of float
        Shift from the layout to the image common to all tables (east, north) [m].
    tables : pandas.DataFrame
        Per layout table: ``table_id``, ``dx_m``, ``dy_m`` (its own shift less the common one),
        ``turn_deg``, ``matched``, ``modules``, ``moved``, ``turned``.
    findings : geopandas.GeoDataFrame
        One row per finding: ``finding``, ``module_id``, ``table_id``, ``detail``, geometry.
    """

    match: np.ndarray
    common_shift_m: tuple[float, float]
    tables: Any
    findings: Any

    def counts(self) -> dict:
        f = self.findings["finding"]
        return {k: int((f == k).sum()) for k in
                ("missing_from_layout", "no_module_found", "table_moved", "table_turned")}


def _centres(gdf: Any) -> np.ndarray:
    c = gdf.geometry.centroid
    return np.column_stack([c.x.to_numpy(), c.y.to_numpy()])


def _axis_deg(gdf: Any) -> np.ndarray:
    """Direction of each footprint's longer side of its minimum rotated rectangle [deg, mod 180]."""
    import shapely

    rect = shapely.oriented_envelope(np.asarray(gdf.geometry.to_numpy()))
    coords = shapely.get_coordinates(rect).reshape(len(gdf), -1, 2)[:, :3]
    e1 = coords[:, 1] - coords[:, 0]
    e2 = coords[:, 2] - coords[:, 1]
    long = np.where((np.hypot(*e1.T) >= np.hypot(*e2.T))[:, None], e1, e2)
    return np.degrees(np.arctan2(long[:, 1], long[:, 0])) % 180.0


def _turn(a: np.ndarray, b: np.ndarray) -> float:
    d = ((b - a + 90.0) % 180.0) - 90.0
    return float(np.median(d)) if d.size else math.nan


def check_layout(layout: Any, detected: Any, settings: dict) -> LayoutCheck:
    """Compare a layout (modules GeoDataFrame, ortho CRS) with detected modules.

    Parameters
    ----------
    layout : geopandas.GeoDataFrame
        From :func:`pvscan.io.layout.read_layout` (``module_id``, ``table_id``).
    detected : geopandas.GeoDataFrame
        ``DetectedLayout.modules``.
    settings : mapping
        ``[layout_detect]``: ``check_match_m``, ``check_search_m``, ``check_move_m``,
        ``check_turn_deg``.
    """
    import geopandas as gpd
    import pandas as pd

    lc, dc = _centres(layout), _centres(detected)
    n = len(layout)
    match = np.full(n, -1, int)
    tcols = ["table_id", "dx_m", "dy_m", "turn_deg", "matched", "modules", "moved", "turned"]
    if len(detected) == 0 or n == 0:
        common = (0.0, 0.0)
        tables = pd.DataFrame(columns=tcols)
    else:
        tree = cKDTree(dc)
        dist, j = tree.query(lc, distance_upper_bound=float(settings["check_search_m"]))
        ok = np.isfinite(dist)
        off = dc[j[ok]] - lc[ok] if ok.any() else np.zeros((0, 2))
        common = (float(np.median(off[:, 0])), float(np.median(off[:, 1]))) if len(off) else (0.0, 0.0)
        rows = []
        tid = layout["table_id"].to_numpy()
        la, da = _axis_deg(layout), _axis_deg(detected)
        for t in pd.unique(tid):
            idx = np.flatnonzero(tid == t)
            # the table's own shift: nearest detected centres after the common shift, median
            p = lc[idx] + np.array(common)
            d1, j1 = tree.query(p, distance_upper_bound=float(settings["check_search_m"]))
            good = np.isfinite(d1)
            own = np.median(dc[j1[good]] - p[good], axis=0) if good.any() else np.zeros(2)
            d2, j2 = tree.query(p + own, distance_upper_bound=float(settings["check_match_m"]))
            hit = np.isfinite(d2)
            match[idx[hit]] = j2[hit]
            turn = _turn(la[idx[hit]], da[j2[hit]]) if hit.any() else math.nan
            moved = bool(hit.sum() >= 2 and math.hypot(*own) > float(settings["check_move_m"]))
            turned = bool(math.isfinite(turn) and abs(turn) > float(settings["check_turn_deg"]))
            rows.append({"table_id": t, "dx_m": float(own[0]), "dy_m": float(own[1]), "turn_deg": turn,
                         "matched": int(hit.sum()), "modules": int(idx.size), "moved": moved, "turned": turned})
        tables = pd.DataFrame(rows, columns=tcols)
        # one detected module matched twice: keep the nearer layout module
        taken = match >= 0
        if taken.any():
            dd = np.full(n, np.inf)
            dd[taken] = np.hypot(*(dc[match[taken]] - lc[taken]).T)
            order = np.argsort(dd, kind="stable")
            seen: set[int] = set()
            for i in order:
                if match[i] >= 0:
                    if match[i] in seen:
                        match[i] = -1
                    else:
                        seen.add(int(match[i]))
    finds: list[dict] = []
    used = set(match[match >= 0].tolist())
    for k in range(len(detected)):
        if k not in used and detected["status"].iloc[k] == "ok":
            finds.append({"finding": "missing_from_layout", "module_id": detected["module_id"].iloc[k],
                          "table_id": detected["table_id"].iloc[k], "detail": "glass without a layout module",
                          "geometry": detected.geometry.iloc[k]})
    for i in np.flatnonzero(match < 0):
        finds.append({"finding": "no_module_found", "module_id": layout["module_id"].iloc[i],
                      "table_id": layout["table_id"].iloc[i], "detail": "no module detected under it",
                      "geometry": layout.geometry.iloc[i]})
    if len(tables):
        from shapely import union_all

        tid = layout["table_id"].to_numpy()
        for r in tables.itertuples():
            if r.moved or r.turned:
                geom = union_all(np.asarray(layout.geometry.to_numpy()[tid == r.table_id]))
                moved_note = f"moved {r.dx_m:+.2f} m east, {r.dy_m:+.2f} m north"
                for kind, flag, detail in (("table_moved", r.moved, moved_note),
                                           ("table_turned", r.turned, f"turned {r.turn_deg:+.2f} deg")):
                    if flag:
                        finds.append({"finding": kind, "module_id": None, "table_id": r.table_id,
                                      "detail": detail, "geometry": geom})
    cols = ["finding", "module_id", "table_id", "detail", "geometry"]
    findings = gpd.GeoDataFrame(finds, columns=cols, geometry="geometry", crs=detected.crs) if finds else \
        gpd.GeoDataFrame({c: [] for c in cols}, geometry="geometry", crs=detected.crs)
    return LayoutCheck(match=match, common_shift_m=common, tables=tables, findings=findings)


def corrected_layout(layout: Any, detected: Any, check: LayoutCheck) -> Any:
    """Detected footprints carrying the layout's ids and attributes where matched.

    Returns a GeoDataFrame (ortho CRS) with ``KEEP_COLUMNS`` present in the layout,
    ``table_row``, ``table_col`` and ``source`` (``layout`` when the ids are the layout's,
    ``detected`` for a module the layout lacked); unmatched layout modules are left out.
    """
    import geopandas as gpd

    out = detected[["module_id", "table_id", "table_row", "table_col", "status", "geometry"]].copy()
    out["source"] = "detected"
    keep = [c for c in KEEP_COLUMNS if c in layout.columns]
    for c in keep:
        if c not in out.columns:
            out[c] = None
    out = out.astype({c: object for c in keep})
    li = np.flatnonzero(check.match >= 0)
    di = check.match[li]
    for c in keep + ["table_row", "table_col"]:
        if c in layout.columns:
            vals = layout[c].to_numpy(dtype=object)[li]
            col = out[c].to_numpy(dtype=object).copy()
            col[di] = vals
            out[c] = col
    src = out["source"].to_numpy(dtype=object).copy()
    src[di] = "layout"
    out["source"] = src
    return gpd.GeoDataFrame(out, geometry="geometry", crs=detected.crs)
