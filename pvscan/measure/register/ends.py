"""Table ends: which of two placements one module pitch apart puts the tables where they are.

A placement of periodic rows and the same placement one module pitch along (or across) the
rows put footprints on modules everywhere but at the table ends. The module evidence
(:mod:`pvscan.measure.register.evidence`) reads the end footprints among all the others,
and a footprint beyond a table end can read as well as one on glass: ground as warm as the
glass and smoother than it, beside the dark table edge, has a low spread and a strong
outline.

This test reads only what tells the two apart. Modules of one table look alike: each
*pitch cell* (a module and half the gap to each neighbour, seen along the line of modules)
shows the same frame lines at its two ends and the same glass between them, whatever the
module's temperature; ground beyond a table end does not (one frame line at most, a
shadow, ground texture). The likeness of two cells is their normalised cross-correlation
(NCC of their ranks) on the same module-aligned grid. For a line of modules
``1..n`` placed by P (a table row along the rows, or a table column across them) and the
alternative P + s (one pitch ``s`` toward module n):

- P puts glass in cell 1 and ground in cell n + 1;
- P + s puts ground in cell 1 and glass in cell n + 1;

so ``d = NCC(cell 1, cell 2) - NCC(cell n + 1, cell n)`` is positive when P is right and
negative when P + s is. Every line of modules whose end is clear of other tables gives one
such vote; their median over the site decides (a defective or shaded end module is a
single vote), and a median at or below ``[register] ends_min_vote`` flags the placement.

References
----------
.. [1] J. P. Lewis, "Fast normalized cross-correlation", Vision Interface 1995, 120-123
   (the normalised cross-correlation as a template likeness insensitive to brightness
   and contrast).
.. [2] C. Spearman, "The proof and measurement of association between two things",
   American Journal of Psychology 15(1), 72-101, 1904 (correlation of ranks).
"""
from __future__ import annotations

import contextlib
import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
from rasterio.windows import Window

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

__all__ = ["end_votes", "end_lines", "free_ends", "judge_ends"]

_FRAME = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]


def end_lines(modules: gpd.GeoDataFrame) -> dict[str, list[tuple[int, int, int]]]:
    """Lines of modules whose two ends are table ends, by direction.

    Returns ``{"along": [...], "across": [...]}``: for each table row (``along``, ordered by
    ``table_col``) and each table column (``across``, ordered by ``table_row``) of at least
    two modules with no missing one, the positions (row numbers in ``modules``) of its
    first and last module and its number of modules."""
    import pandas as pd

    out: dict[str, list[tuple[int, int, int]]] = {"along": [], "across": []}
    need = {"table_id", "table_row", "table_col", *_FRAME}
    if not need <= set(modules.columns) or len(modules) == 0:
        return out
    df = pd.DataFrame({"t": modules["table_id"].astype(str).to_numpy(),
                       "r": pd.to_numeric(modules["table_row"], errors="coerce").to_numpy(),
                       "c": pd.to_numeric(modules["table_col"], errors="coerce").to_numpy(),
                       "pos": np.arange(len(modules))}).dropna()
    for name, key, step in (("along", "r", "c"), ("across", "c", "r")):
        for _, g in df.groupby(["t", key], sort=True):
            if len(g) < 2:
                continue
            g = g.sort_values(step)
            k = g[step].to_numpy()
            if np.any(np.diff(k) != 1):
                continue
            out[name].append((int(g["pos"].iloc[0]), int(g["pos"].iloc[-1]), len(g)))
    return out


def free_ends(modules: gpd.GeoDataFrame, lines: list[tuple[int, int, int]], clear_m: float) -> np.ndarray:
    """Whether the place one pitch beyond each end of each line holds no module [bool].

    (len(lines), 2): beyond the last module (first column) and beyond the first (second).
    A neighbouring table closer than a pitch puts glass there whichever placement is right:
    that end cannot vote. The module's outline moved one pitch is shrunk by ``clear_m`` [m]
    first (it touches its own table's end)."""
    import shapely
    import shapely.affinity

    out = np.zeros((len(lines), 2), bool)
    if not lines:
        return out
    geoms = np.asarray(modules.geometry.values, dtype=object)
    tree = shapely.STRtree(geoms)
    fr = modules[_FRAME].to_numpy(float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    for i, (first, last, n) in enumerate(lines):
        sx, sy = (cx[last] - cx[first]) / max(n - 1, 1), (cy[last] - cy[first]) / max(n - 1, 1)
        for j, (pos, sgn) in enumerate(((last, 1.0), (first, -1.0))):
            g = geoms[pos]
            if g is None or g.is_empty:
                continue
            cell = shapely.affinity.translate(g, sgn * sx, sgn * sy).buffer(-clear_m)
            out[i, j] = cell.is_empty is False and len(tree.query(cell, predicate="intersects")) == 0
    return out


def _cell_grid(frame: np.ndarray, step: np.ndarray, gsd: float, inset: float) -> tuple[np.ndarray, np.ndarray]:
    """Map points (x, y) of a module's pitch cell: ``|step|`` long along ``step``, centred on
    the module, and the module's side across ``step`` less ``inset`` of it at each side [m]."""
    ox, oy, ux, uy, vx, vy = frame
    cx, cy = ox + 0.5 * (ux + vx), oy + 0.5 * (uy + vy)
    ls = float(np.hypot(*step))
    a = step / ls
    n = np.array([-a[1], a[0]])
    # the module's extent across the step: the larger projection of its two sides
    across = max(abs(ux * n[0] + uy * n[1]), abs(vx * n[0] + vy * n[1]))
    na = max(int(math.ceil(ls / gsd)), 4)
    nn = max(int(math.ceil(across * (1.0 - 2.0 * inset) / gsd)), 2)
    s = (np.arange(na) + 0.5) / na * ls - 0.5 * ls
    t = (np.arange(nn) + 0.5) / nn * across * (1.0 - 2.0 * inset) - 0.5 * across * (1.0 - 2.0 * inset)
    ss, tt = np.meshgrid(s, t)
    return cx + ss * a[0] + tt * n[0], cy + ss * a[1] + tt * n[1]


def _ncc(a: np.ndarray, b: np.ndarray, min_valid: float) -> float:
    """Normalised cross-correlation of the ranks of two equal grids [-] (NaN: too few valid
    points or flat).

    Ranks (Spearman's correlation) rather than values: a table end beside ground 10-20 K
    warmer or cooler than the glass leaks a strip of that contrast into the end module's
    cell, which would outweigh the frame lines of a few kelvin that make modules alike."""
    from scipy.stats import rankdata

    ok = np.isfinite(a) & np.isfinite(b)
    if ok.mean() < min_valid:
        return float("nan")
    x = rankdata(a[ok])
    y = rankdata(b[ok])
    x -= x.mean()
    y -= y.mean()
    den = math.sqrt(float(x @ x) * float(y @ y))
    return float(x @ y) / den if den > 0 else float("nan")


def end_votes(orthos: Any, placed: gpd.GeoDataFrame, lines: list[tuple[int, int, int]],
              cfg: Mapping[str, Any]) -> np.ndarray:
    """Per line of modules, the vote ``d`` of the placement against the same placement one
    module pitch toward its last module (first column) and one pitch back (second) [-].

    The pitch of a line is the step between its modules as placed: (centre of the last -
    centre of the first) / (n - 1).

    Parameters
    ----------
    orthos : OrthoSet
    placed : geopandas.GeoDataFrame
        Modules with frame columns where the placement puts them (ortho CRS) [m].
    lines : list of (int, int, int)
        First and last module of each line and its number of modules (:func:`end_lines`).
    cfg : mapping
        ``[register]`` settings: ``ends_inset`` [-], ``ends_min_valid`` [-].

    Returns
    -------
    numpy.ndarray
        (len(lines), 2): ``NCC(cell 1, cell 2) - NCC(cell n+1, cell n)`` and
        ``NCC(cell n, cell n-1) - NCC(cell 0, cell 1)``; positive favours the placement,
        NaN where a cell could not be read.
    """
    from scipy.ndimage import map_coordinates

    out = np.full((len(lines), 2), np.nan)
    if not lines:
        return out
    fr = placed[_FRAME].to_numpy(float)
    tiles = list(orthos.tiles)
    gsd = abs(float(tiles[0].transform.a))
    inset = float(cfg["ends_inset"])
    min_valid = float(cfg["ends_min_valid"])
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    cache = getattr(orthos, "window_cache", None)

    def cells(read: Any, frame: np.ndarray, ks: tuple[int, ...], step: np.ndarray) -> list[np.ndarray]:
        """The cells k pitches ``step`` from ``frame``'s module, sampled bilinearly."""
        gx, gy = _cell_grid(frame, step, gsd, inset)
        pts = [(gx + k * step[0], gy + k * step[1]) for k in ks]
        allx = np.concatenate([p[0].ravel() for p in pts])
        ally = np.concatenate([p[1].ravel() for p in pts])
        mx, my = float(np.mean(allx)), float(np.mean(ally))
        ti = next((j for j, t in enumerate(tiles)
                   if t.bounds.left <= mx <= t.bounds.right and t.bounds.bottom <= my <= t.bounds.top), 0)
        tr = tiles[ti].transform
        cols, rows = ~tr * (allx, ally)
        c0, r0 = int(math.floor(np.min(cols))) - 2, int(math.floor(np.min(rows))) - 2
        w, h = int(math.ceil(np.max(cols))) + 3 - c0, int(math.ceil(np.max(rows))) + 3 - r0
        img = read(ti, Window(c0, r0, w, h)).astype(np.float64)
        res = []
        for px, py in pts:
            c, r = ~tr * (px, py)
            # pixel centres sit at half-integer pixel coordinates
            v = map_coordinates(img, [np.asarray(r) - r0 - 0.5, np.asarray(c) - c0 - 0.5], order=1,
                                mode="constant", cval=np.nan)
            res.append(v)
        return res

    with cache() if cache is not None else contextlib.nullcontext(orthos.read) as read:
        for i, (first, last, n) in enumerate(lines):
            step = np.array([cx[last] - cx[first], cy[last] - cy[first]]) / max(n - 1, 1)
            if not (np.all(np.isfinite(step)) and np.hypot(*step) > 0):
                continue
            # cells 0, 1, 2 seen from the first module (0: one pitch before it) ...
            c0, c1, c2 = cells(read, fr[first], (-1, 0, 1), step)
            # ... and n + 1, n, n - 1 seen from the last
            e1, en, em = cells(read, fr[last], (1, 0, -1), step)
            out[i, 0] = _ncc(c1, c2, min_valid) - _ncc(e1, en, min_valid)
            out[i, 1] = _ncc(en, em, min_valid) - _ncc(c0, c1, min_valid)
    return out


def judge_ends(orthos: Any, modules: gpd.GeoDataFrame, placed: gpd.GeoDataFrame,
               cfg: Mapping[str, Any]) -> dict[str, Any]:
    """Whether the table ends confirm a placement against one module pitch either way.

    Parameters
    ----------
    orthos : OrthoSet
    modules : geopandas.GeoDataFrame
        The layout's modules (table ids, rows and columns) [m].
    placed : geopandas.GeoDataFrame
        The same modules, in the same order, where the placement puts them [m].
    cfg : mapping
        ``[register]`` settings (``ends_inset``, ``ends_min_valid``, ``ends_min_vote``).

    Returns
    -------
    dict
        Per direction (``along``, ``across`` the table rows, when the tables have lines of
        modules that way): the median vote against one pitch forward and one back over the
        lines, and the number of lines [-]; ``lowest`` (the lowest of those medians, None
        when no line could be read), ``limit`` (``ends_min_vote``) and ``decisive``
        (``lowest`` above ``limit``, or nothing to read: the ends do not prefer a placement
        one pitch away).
    """
    lines = end_lines(modules)
    out: dict[str, Any] = {}
    meds: list[float] = []
    for name in ("along", "across"):
        if not lines[name]:
            continue
        v = end_votes(orthos, placed, lines[name], cfg)
        v[~free_ends(modules, lines[name], float(cfg["ends_clear_m"]))] = np.nan
        m = []
        for j in range(2):
            col = v[:, j][np.isfinite(v[:, j])]
            m.append(float(np.median(col)) if len(col) else float("nan"))
        out[name] = {"votes": [round(x, 4) if math.isfinite(x) else None for x in m],
                     "lines": int(np.isfinite(v).all(axis=1).sum())}
        meds += [x for x in m if math.isfinite(x)]
    lim = float(cfg["ends_min_vote"])
    low = min(meds) if meds else None
    out.update(lowest=round(low, 4) if low is not None else None, limit=lim,
               decisive=bool(low is None or low > lim))
    return out
