"""Pitches of the layout's rows: the vectors one module along a table row and one table
across the rows, which the one-pitch ambiguity of periodic rows is tested against [m]."""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from pvscan.measure.register.evidence import Placement, _compose, _inverse
from pvscan.measure.register.search import refine_placement

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

__all__ = ["_pitches", "_row_pitch", "_placement_of", "_turned", "_screen_turned", "_distinct"]


def _pitches(modules: gpd.GeoDataFrame) -> list[np.ndarray]:
    """Median vectors from a module to its next neighbour along a table row and across it [m]."""
    return list(_named_pitches(modules).values())


def _named_pitches(modules: gpd.GeoDataFrame) -> dict[str, np.ndarray]:
    """:func:`_pitches` by direction: ``along`` a table row, ``across`` it (the names of
    :func:`pvscan.measure.register.ends.end_lines`), each when the tables have one [m]."""
    import pandas as pd

    need = {"table_id", "table_row", "table_col", "fx0", "fy0", "fux", "fuy", "fvx", "fvy"}
    if not need <= set(modules.columns):
        return {}
    cx = modules["fx0"].to_numpy(float) + 0.5 * (modules["fux"].to_numpy(float) + modules["fvx"].to_numpy(float))
    cy = modules["fy0"].to_numpy(float) + 0.5 * (modules["fuy"].to_numpy(float) + modules["fvy"].to_numpy(float))
    df = pd.DataFrame({"t": modules["table_id"].astype(str).to_numpy(), "r": modules["table_row"].to_numpy(),
                       "c": modules["table_col"].to_numpy(), "x": cx, "y": cy})
    out = {}
    for name, key, step in (("along", "r", "c"), ("across", "c", "r")):
        d = df.sort_values(["t", key, step])
        same = (d["t"].to_numpy()[1:] == d["t"].to_numpy()[:-1]) & (d[key].to_numpy()[1:] == d[key].to_numpy()[:-1]) & (
            np.diff(d[step].to_numpy()) == 1)
        if same.any():
            dx = np.diff(d["x"].to_numpy())[same]
            dy = np.diff(d["y"].to_numpy())[same]
            v = np.array([np.median(dx), np.median(dy)])
            if np.all(np.isfinite(v)) and np.hypot(*v) > 0:
                out[name] = v
    return out


def _row_pitch(modules: gpd.GeoDataFrame, along: np.ndarray | None) -> np.ndarray | None:
    """Median vector from a table to the next table across the rows (the row pitch) [m].

    ``along`` is the vector between neighbouring modules along a table row. For each table
    the nearest other table whose centre lies across the rows (its offset along the row
    shorter than half the longer table) gives one vector; the median of those pointing one
    way is the pitch. None when the site has one row of tables."""
    if along is None or "table_id" not in modules.columns or len(modules) == 0:
        return None
    a = np.asarray(along, float)
    a = a / max(float(np.hypot(*a)), 1e-12)
    n = np.array([-a[1], a[0]])
    fr = modules[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy(float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    tid = modules["table_id"].astype(str).to_numpy()
    names, inv = np.unique(tid, return_inverse=True)
    if len(names) < 2:
        return None
    cnt = np.bincount(inv).astype(float)
    tx = np.bincount(inv, cx) / cnt
    ty = np.bincount(inv, cy) / cnt
    s_al = (cx - tx[inv]) * a[0] + (cy - ty[inv]) * a[1]
    half = np.zeros(len(names))
    np.maximum.at(half, inv, np.abs(s_al))
    vecs = []
    for i in range(len(names)):
        dx, dy = tx - tx[i], ty - ty[i]
        d_al = dx * a[0] + dy * a[1]
        d_n = dx * n[0] + dy * n[1]
        ok = (np.abs(d_al) < np.maximum(half, half[i])) & (d_n > 0.3)
        if ok.any():
            j = int(np.argmin(np.where(ok, d_n, np.inf)))
            vecs.append((dx[j], dy[j]))
    if not vecs:
        return None
    v = np.median(np.asarray(vecs), axis=0)
    return v if np.all(np.isfinite(v)) and np.hypot(*v) > 0.3 else None


def _placement_of(q: Mapping[str, Any], centre: tuple[float, float]) -> Placement:
    """The placement of a judged proposal's record (shift [m], rotation [deg], scale)."""
    return Placement(float(q["shift_m"][0]), float(q["shift_m"][1]), float(q["rotation_deg"]), float(q["scale"]),
                     centre[0], centre[1])


def _turned(modules: gpd.GeoDataFrame, starts: list[Placement], cfg: Mapping[str, Any]) -> list[Placement]:
    """Each start turned by whole steps either way within ``max_rotation_deg`` [deg]: the step
    moves the module farthest from the centre by ``retry_turn_fraction`` of the modules' shorter
    side (the reach of the fit from a start), nearest turns first."""
    if not starts or len(modules) == 0:
        return []
    fr = modules[["fux", "fuy", "fvx", "fvy"]].to_numpy(float)
    side = float(np.nanmedian(np.minimum(np.hypot(fr[:, 0], fr[:, 1]), np.hypot(fr[:, 2], fr[:, 3]))))
    b = modules.total_bounds
    reach = 0.5 * float(np.hypot(b[2] - b[0], b[3] - b[1]))
    if not (math.isfinite(side) and reach > 0):
        return []
    step = math.degrees(float(cfg["retry_turn_fraction"]) * side / reach)
    lim = float(cfg["max_rotation_deg"])
    out = []
    for k in range(1, int(lim // step) + 1 if step > 0 else 1):
        for p in starts:
            for sgn in (1.0, -1.0):
                th = p.theta_deg + sgn * k * step
                if abs(th) <= lim:
                    out.append(p.moved(theta_deg=th))
    return out


def _distinct(proposals: list[Placement], bounds: Any, tol_m: float) -> list[Placement]:
    """Proposals less any that moves no footprint more than ``tol_m`` from an earlier one [m]
    (``[register] distinct_tol_m``)."""
    out: list[Placement] = []
    for p in proposals:
        if all(_compose(p, _inverse(q)).displacement_max(bounds) > tol_m for q in out):
            out.append(p)
    return out


def _screen_turned(starts: list[Placement], cfg: Mapping[str, Any],
                   sample_at: Callable[[Placement], Any]) -> list[Placement]:
    """``starts`` ordered by a cheap first look, the most promising first (ties: given order).

    Each start is read by ``sample_at`` (the decimated grid of the coarse fit, around the
    start), moved by translation only (first inset, no re-read) and scored by its module
    evidence: a turn near the truth puts the far modules' cores on glass, a wrong one half a
    module off. Fitting a start in full costs tens of evidence evaluations on several reads;
    this look costs one read."""
    if len(starts) < 2:
        return list(starts)
    sub = {**cfg, "evidence_inset": float(cfg["evidence_insets"][0])}
    scores = []
    for p in starts:
        _, e = refine_placement(sample_at(p), Placement(cx=p.cx, cy=p.cy), sub, rotate=False, scale=False)
        scores.append(e if math.isfinite(e) else float("inf"))
    return [starts[i] for i in sorted(range(len(starts)), key=lambda i: (scores[i], i))]
