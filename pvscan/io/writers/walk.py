"""The order a crew walks the work orders in: by urgency band, then along a short path.

``priority`` says what matters most (safety first, then the larger energy loss);
``walk_order`` says in which order to visit the anomalies on site. Within each urgency band
(``safety``, then ``repair``, then ``monitor``; every safety item before any other) the
anomalies are visited table by table along a short path:

1. the tables that hold anomalies of the band are ordered by a nearest-neighbour tour over
   their centroids, improved by 2-opt moves (reverse a stretch of the tour when that makes
   it shorter) until none helps or ``[outputs] walk_two_opt_passes`` passes are done. The
   first band starts at the table at one end of the plant (the lowest along its principal
   axis); each later band starts where the previous one ended;
2. within a table the anomalies are visited along the table (``table_col``, then
   ``table_row``), starting from the table end nearer to where the walk comes from.

Work is O(n) over modules (one centroid per table, vectorised) and O(k^2) per 2-opt pass
over the k tables that hold anomalies of one band.

References
----------
.. [1] G. A. Croes, "A method for solving traveling-salesman problems", Operations Research
   6(6), 791-812, 1958. doi:10.1287/opre.6.6.791 (the 2-opt move)
.. [2] D. J. Rosenkrantz, R. E. Stearns and P. M. Lewis, "An analysis of several heuristics
   for the traveling salesman problem", SIAM J. Comput. 6(3), 563-581, 1977.
   doi:10.1137/0206041 (nearest-neighbour tours)
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import shapely

from pvscan.io.writers.geometry import anomaly_indices
from pvscan.io.writers.values import settings_of

__all__ = ["BANDS", "prepare_anomalies", "walk_order", "path_length", "two_opt"]

#: Urgency bands in walking order; anomalies of any other severity come last.
BANDS = ("safety", "repair", "monitor")

#: Module columns an anomaly takes from its first module when it has none of its own.
MODULE_FIELDS = ("table_id", "table_row", "table_col", "string_id", "string_index", "combiner_id",
                 "inverter_id")


def path_length(points: np.ndarray, start: np.ndarray | None = None) -> float:
    """Length of the open path through ``points`` (k, 2) in order, from ``start`` if given. [m]"""
    pts = np.asarray(points, dtype=float).reshape(-1, 2)
    if start is not None:
        pts = np.vstack([np.asarray(start, dtype=float).reshape(1, 2), pts])
    return float(np.hypot(*np.diff(pts, axis=0).T).sum()) if len(pts) > 1 else 0.0


def _nearest_neighbour(points: np.ndarray, start: np.ndarray) -> list[int]:
    """Order of ``points`` visited greedily, each time the nearest not yet visited, from ``start``."""
    k = len(points)
    left = np.ones(k, dtype=bool)
    here = np.asarray(start, dtype=float)
    order = []
    for _ in range(k):
        d = np.hypot(points[:, 0] - here[0], points[:, 1] - here[1])
        d[~left] = np.inf
        j = int(np.argmin(d))
        order.append(j)
        left[j] = False
        here = points[j]
    return order


def two_opt(points: np.ndarray, order: list[int], start: np.ndarray, max_passes: int) -> list[int]:
    """Improve the open path ``start -> points[order]`` by 2-opt moves.

    A move reverses the stretch ``order[i..j]``; it replaces the edges ``(i-1, i)`` and
    ``(j, j+1)`` by ``(i-1, j)`` and ``(i, j+1)`` (no edge after the path's end), and is
    taken when that shortens the path. Each pass tries every ``i`` against all ``j`` at
    once (numpy); passes stop when none helps or after ``max_passes``.
    """
    path = np.vstack([np.asarray(start, dtype=float).reshape(1, 2), points[np.asarray(order, dtype=int)]])
    idx = np.concatenate([[-1], np.asarray(order, dtype=int)])
    m = len(path)  # node 0 is the fixed start
    if m < 3:
        return list(idx[1:])
    eps = 1e-9
    for _ in range(int(max_passes)):
        improved = False
        for i in range(1, m - 1):
            j = np.arange(i + 1, m)
            a, b = path[i - 1], path[i]
            c = path[j]
            nxt = np.minimum(j + 1, m - 1)
            has_next = j + 1 < m
            d = path[nxt]
            old = np.hypot(*(b - a)) + np.where(has_next, np.hypot(*(d - c).T), 0.0)
            new = np.hypot(*(c - a).T) + np.where(has_next, np.hypot(*(d - b).T), 0.0)
            gain = old - new
            best = int(np.argmax(gain))
            if gain[best] > eps:
                jj = int(j[best])
                path[i:jj + 1] = path[i:jj + 1][::-1].copy()
                idx[i:jj + 1] = idx[i:jj + 1][::-1].copy()
                improved = True
        if not improved:
            break
    return [int(x) for x in idx[1:]]


def _first_index(anomalies: pd.DataFrame) -> np.ndarray:
    out = np.full(len(anomalies), -1, dtype=int)
    for k, (_, row) in enumerate(anomalies.iterrows()):
        idx = anomaly_indices(row)
        if idx:
            out[k] = idx[0]
    return out


def _column(modules: Any, col: str, rows: np.ndarray) -> np.ndarray:
    vals = np.full(len(rows), None, dtype=object)
    if col in modules.columns:
        ok = rows >= 0
        vals[ok] = modules[col].to_numpy(dtype=object)[rows[ok]]
    return vals


def walk_order(anomalies: pd.DataFrame, modules: Any, settings: Mapping | None = None) -> np.ndarray:
    """The walking order (1..N) of the anomalies, aligned with their rows.

    Parameters
    ----------
    anomalies : pandas.DataFrame
        Anomalies with ``severity`` and ``module_index`` (or ``module_indices``).
    modules : geopandas.GeoDataFrame
        The modules frame in a projected CRS [m]: footprints, ``table_id`` and, when
        known, ``table_row`` and ``table_col``.
    settings : mapping, optional
        The pipeline or its ``[outputs]`` section (``walk_two_opt_passes``).

    Returns
    -------
    numpy.ndarray of int
        ``walk_order`` per anomaly row: safety items first, then repair, then monitor
        items; within a band table by table along a short path.
    """
    n = len(anomalies)
    if n == 0:
        return np.zeros(0, dtype=int)
    cfg = settings_of(settings)
    passes = int(cfg["walk_two_opt_passes"])
    first = _first_index(anomalies)
    xy = np.full((n, 2), np.nan)
    ok = first >= 0
    if ok.any():
        xy[ok] = shapely.get_coordinates(shapely.centroid(modules.geometry.to_numpy()[first[ok]]))
    xy[~np.isfinite(xy).all(axis=1)] = 0.0
    tables = _column(modules, "table_id", first)
    keys = np.array([f"table:{t}" if t is not None and not (isinstance(t, float) and math.isnan(t))
                     else f"anomaly:{k}" for k, t in enumerate(tables)], dtype=object)
    # table centroids from every module of the table (one vectorised pass over the modules)
    cent = {}
    if "table_id" in modules.columns and len(modules):
        mxy = shapely.get_coordinates(shapely.centroid(modules.geometry.to_numpy()))
        frame = pd.DataFrame({"t": modules["table_id"].astype(str).to_numpy(), "x": mxy[:, 0], "y": mxy[:, 1]})
        g = frame.groupby("t", sort=False)[["x", "y"]].mean()
        cent = {f"table:{t}": np.array([x, y]) for t, x, y in zip(g.index, g["x"], g["y"])}
    for k, key in enumerate(keys):
        cent.setdefault(key, xy[k])
    col = pd.to_numeric(pd.Series(_column(modules, "table_col", first)), errors="coerce").to_numpy(dtype=float)
    row = pd.to_numeric(pd.Series(_column(modules, "table_row", first)), errors="coerce").to_numpy(dtype=float)
    sev = anomalies["severity"].tolist() if "severity" in anomalies.columns else [None] * n
    band = np.array([BANDS.index(s) if s in BANDS else len(BANDS) for s in sev])

    order: list[int] = []
    here: np.ndarray | None = None
    for b in sorted(set(band.tolist())):
        members = np.flatnonzero(band == b)
        tkeys = list(dict.fromkeys(keys[members].tolist()))
        pts = np.array([cent[t] for t in tkeys], dtype=float).reshape(-1, 2)
        if here is None:
            start = _plant_end(np.array(list(cent.values()), dtype=float).reshape(-1, 2), pts)
        else:
            start = here
        tour = two_opt(pts, _nearest_neighbour(pts, start), start, passes)
        for t in tour:
            mem = members[keys[members] == tkeys[t]]
            c = np.where(np.isfinite(col[mem]), col[mem], 0.0)
            r = np.where(np.isfinite(row[mem]), row[mem], 0.0)
            along = np.lexsort((r, c)) if np.isfinite(col[mem]).any() else _along_axis(xy[mem])
            seq = mem[along]
            if len(seq) > 1 and (np.hypot(*(xy[seq[-1]] - start)) < np.hypot(*(xy[seq[0]] - start))):
                seq = seq[::-1]
            order.extend(seq.tolist())
            start = xy[seq[-1]]
        here = start
    out = np.empty(n, dtype=int)
    out[np.asarray(order, dtype=int)] = np.arange(1, n + 1)
    return out


def _along_axis(xy: np.ndarray) -> np.ndarray:
    """Order of points along their principal axis (for anomalies without table positions)."""
    if len(xy) < 2:
        return np.arange(len(xy))
    c = xy - xy.mean(axis=0)
    _, _, vt = np.linalg.svd(c, full_matrices=False)
    return np.argsort(c @ vt[0], kind="stable")


def _plant_end(all_tables: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """The point of ``pts`` lowest along the plant's principal axis (where the first walk starts)."""
    if len(all_tables) >= 2:
        c = all_tables.mean(axis=0)
        _, _, vt = np.linalg.svd(all_tables - c, full_matrices=False)
        axis = vt[0] if vt[0][np.argmax(np.abs(vt[0]))] > 0 else -vt[0]
        return pts[int(np.argmin((pts - c) @ axis))]
    return pts[0]


def prepare_anomalies(anomalies: pd.DataFrame, modules: Any, settings: Mapping | None = None) -> pd.DataFrame:
    """The anomalies as every writer shows them: in priority order, with ``anomaly_id``,
    ``walk_order`` and the first module's table and electrical attributes (``table_id``,
    ``table_row``, ``table_col``, ``string_id``, ``string_index``, ``combiner_id``,
    ``inverter_id``) where the anomaly has none of its own.
    """
    from pvscan.diagnose.rank import assign_anomaly_ids

    out = assign_anomaly_ids(anomalies)
    if "priority" in out.columns and len(out):
        out = out.sort_values("priority", kind="stable", na_position="last")
    out = out.reset_index(drop=True)
    first = _first_index(out)
    for col in MODULE_FIELDS:
        if col not in modules.columns:
            if col not in out.columns:
                out[col] = pd.Series([None] * len(out), dtype=object)
            continue
        from_mod = _column(modules, col, first)
        if col in out.columns:
            own = out[col].to_numpy(dtype=object)
            missing = pd.isna(pd.Series(own)).to_numpy()
            from_mod = np.where(missing, from_mod, own)
        vals = [None if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA else v
                for v in from_mod.tolist()]
        if col in ("table_id", "string_id", "combiner_id", "inverter_id"):
            vals = [None if v is None else str(v) for v in vals]
        out[col] = pd.Series(vals, dtype=object)
    if "walk_order" not in out.columns or out["walk_order"].isna().any():
        out["walk_order"] = walk_order(out, modules, settings)
    return out
