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

__all__ = ["end_votes", "end_lines", "free_ends", "glass_decides", "glass_votes", "judge_ends", "pitch_steps",
           "sunlit_ends"]

_FRAME = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]


def end_lines(modules: gpd.GeoDataFrame) -> dict[str, list[tuple[int, int, int]]]:
    """Lines of modules whose two ends are table ends, by direction.

    Returns ``{"along": [...], "across": [...]}``: for each table row (``along``, ordered by
    ``table_col``) and each table column (``across``, ordered by ``table_row``) of at least
    two modules with no missing one, the positions (row numbers in ``modules``) of its
    first and last module and its number of modules. Lines are listed by table id (as
    text) and then by row (``along``) or column (``across``)."""
    import pandas as pd

    out: dict[str, list[tuple[int, int, int]]] = {"along": [], "across": []}
    need = {"table_id", "table_row", "table_col", *_FRAME}
    if not need <= set(modules.columns) or len(modules) == 0:
        return out
    tid = modules["table_id"].astype(str).to_numpy()
    rc = {"r": pd.to_numeric(modules["table_row"], errors="coerce").to_numpy(dtype=float),
          "c": pd.to_numeric(modules["table_col"], errors="coerce").to_numpy(dtype=float)}
    pos = np.nonzero(np.isfinite(rc["r"]) & np.isfinite(rc["c"]))[0]
    if len(pos) == 0:
        return out
    _, code = np.unique(tid[pos], return_inverse=True)  # table ids in text order
    for name, key, step in (("along", "r", "c"), ("across", "c", "r")):
        kv, sv = rc[key][pos], rc[step][pos]
        order = np.lexsort((sv, kv, code))
        g_code, g_key, g_step, g_pos = code[order], kv[order], sv[order], pos[order]
        head = np.ones(len(order), bool)
        head[1:] = (g_code[1:] != g_code[:-1]) | (g_key[1:] != g_key[:-1])
        starts = np.nonzero(head)[0]
        ends = np.append(starts[1:], len(order))
        # a step other than one module between neighbours of a line: a module missing (or twice)
        gap = np.zeros(len(order), np.int64)
        gap[1:] = (~head[1:]) & (np.diff(g_step) != 1)
        gaps = np.add.reduceat(gap, starts)
        keep = ((ends - starts) >= 2) & (gaps == 0)
        out[name] = [(int(g_pos[a]), int(g_pos[b - 1]), int(b - a)) for a, b in zip(starts[keep], ends[keep])]
    return out


def free_ends(modules: gpd.GeoDataFrame, lines: list[tuple[int, int, int]], clear_m: float) -> np.ndarray:
    """Whether the place one pitch beyond each end of each line holds no module [bool].

    (len(lines), 2): beyond the last module (first column) and beyond the first (second).
    A neighbouring table closer than a pitch puts glass there whichever placement is right:
    that end cannot vote. The module's outline moved one pitch is shrunk by ``clear_m`` [m]
    first (it touches its own table's end)."""
    import shapely

    out = np.zeros((len(lines), 2), bool)
    if not lines:
        return out
    geoms = np.asarray(modules.geometry.values, dtype=object)
    tree = shapely.STRtree(geoms)
    fr = modules[_FRAME].to_numpy(float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    first, last, n = np.asarray(lines, np.int64).reshape(-1, 3).T
    den = np.maximum(n - 1, 1).astype(float)
    sx, sy = (cx[last] - cx[first]) / den, (cy[last] - cy[first]) / den
    for j, (pos, sgn) in enumerate(((last, 1.0), (first, -1.0))):
        src = geoms[pos]
        ok = ~(shapely.is_missing(src) | shapely.is_empty(src))
        if not ok.any():
            continue
        src = src[ok]
        coords, idx = shapely.get_coordinates(src, return_index=True)
        # the translation of shapely.affinity.translate, one offset per outline
        xoff, yoff = (sgn * sx)[ok][idx], (sgn * sy)[ok][idx]
        moved = np.column_stack([1.0 * coords[:, 0] + 0.0 * coords[:, 1] + xoff,
                                 0.0 * coords[:, 0] + 1.0 * coords[:, 1] + yoff])
        cells = shapely.buffer(shapely.set_coordinates(src.copy(), moved), -clear_m)
        hits = np.zeros(len(cells), np.int64)
        q = tree.query(cells, predicate="intersects")
        np.add.at(hits, q[0], 1)
        out[np.nonzero(ok)[0], j] = ~shapely.is_empty(cells) & (hits == 0)
    return out


def _cell_grids(frames: np.ndarray, stx: np.ndarray, sty: np.ndarray, gsd: float, inset: float, na: int,
                nn: int) -> tuple[np.ndarray, np.ndarray]:
    """Map points (x, y) of the pitch cells of modules ``frames`` (k, 6), each with its step
    (``stx``, ``sty``): ``|step|`` long along the step, centred on the module, and the module's
    side across the step less ``inset`` of it at each side, ``nn`` x ``na`` points [m]."""
    ox, oy, ux, uy, vx, vy = (frames[:, j] for j in range(6))
    cx, cy = ox + 0.5 * (ux + vx), oy + 0.5 * (uy + vy)
    ls = np.hypot(stx, sty)
    a0, a1 = stx / ls, sty / ls
    n0, n1 = -a1, a0
    # the module's extent across the step: the larger projection of its two sides
    across = np.maximum(np.abs(ux * n0 + uy * n1), np.abs(vx * n0 + vy * n1))
    wide = 1.0 - 2.0 * inset
    s = ((np.arange(na) + 0.5) / na)[None, :] * ls[:, None] - (0.5 * ls)[:, None]
    t = ((np.arange(nn) + 0.5) / nn)[None, :] * across[:, None] * wide - (0.5 * across * wide)[:, None]
    gx = cx[:, None, None] + s[:, None, :] * a0[:, None, None] + t[:, :, None] * n0[:, None, None]
    gy = cy[:, None, None] + s[:, None, :] * a1[:, None, None] + t[:, :, None] * n1[:, None, None]
    return gx, gy


def _cell_sizes(frames: np.ndarray, stx: np.ndarray, sty: np.ndarray, gsd: float,
                inset: float) -> tuple[np.ndarray, np.ndarray]:
    """Points of a pitch cell along the step (at least 4) and across it (at least 2) [-]."""
    ls = np.hypot(stx, sty)
    a0, a1 = stx / ls, sty / ls
    n0, n1 = -a1, a0
    across = np.maximum(np.abs(frames[:, 2] * n0 + frames[:, 3] * n1), np.abs(frames[:, 4] * n0 + frames[:, 5] * n1))
    na = np.maximum(np.ceil(ls / gsd), 4).astype(np.int64)
    nn = np.maximum(np.ceil(across * (1.0 - 2.0 * inset) / gsd), 2).astype(np.int64)
    return na, nn


def _average_ranks(a: np.ndarray) -> np.ndarray:
    """Ranks of the values of each row of ``a`` (k, p), 1 to p, tied values sharing the mean of
    their ranks (Spearman's ranks; those of ``scipy.stats.rankdata``'s default method)."""
    k, p = a.shape
    order = np.argsort(a, axis=1)  # any order of ties: they share their mean rank
    srt = np.take_along_axis(a, order, axis=1)
    head = np.ones((k, p), bool)
    head[:, 1:] = srt[:, 1:] != srt[:, :-1]
    out = np.empty((k, p))
    # rows without ties (the usual case for interpolated pixels): the rank is the position
    free = np.asarray(head.all(axis=1), bool)
    if free.any():
        np.put_along_axis(out, np.where(free[:, None], order, 0) if not free.all() else order,
                          np.broadcast_to(np.arange(1.0, p + 1.0), (k, p)), axis=1)
    tied = np.nonzero(~free)[0]
    if len(tied):
        h = head[tied]
        tail = np.ones((len(tied), p), bool)
        tail[:, :-1] = h[:, 1:]
        at = np.arange(p)
        lo = np.maximum.accumulate(np.where(h, at, 0), axis=1)
        hi = np.minimum.accumulate(np.where(tail, at, p)[:, ::-1], axis=1)[:, ::-1]
        sub = np.empty((len(tied), p))
        np.put_along_axis(sub, order[tied], 0.5 * (lo + hi + 2), axis=1)
        out[tied] = sub
    return out


def _ncc_ranked(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Normalised cross-correlation of rows of ranks [-] (NaN: flat). Ranks are multiples of
    a half and sum to p (p + 1) / 2: every sum here is exact, in any order."""
    x = x - x.mean(axis=1, keepdims=True)
    y = y - y.mean(axis=1, keepdims=True)
    den = np.sqrt(np.einsum("ij,ij->i", x, x) * np.einsum("ij,ij->i", y, y))
    num = np.einsum("ij,ij->i", x, y)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)


def _ncc(a: np.ndarray, b: np.ndarray, min_valid: float) -> np.ndarray:
    """Normalised cross-correlation of the ranks of the rows of two (k, p) arrays [-] (NaN:
    fewer than ``min_valid`` of the points valid in both, or flat).

    Ranks (Spearman's correlation) rather than values: a table end beside ground 10-20 K
    warmer or cooler than the glass leaks a strip of that contrast into the end module's
    cell, which would outweigh the frame lines of a few kelvin that make modules alike."""
    ok = np.isfinite(a) & np.isfinite(b)
    out = np.full(len(a), np.nan)
    use = ok.mean(axis=1) >= min_valid
    full = use & ok.all(axis=1)
    if full.any():
        out[full] = _ncc_ranked(_average_ranks(a[full]), _average_ranks(b[full]))
    for i in np.nonzero(use & ~full)[0]:
        m = ok[i]
        out[i] = _ncc_ranked(_average_ranks(a[i, m][None, :]), _average_ranks(b[i, m][None, :]))[0]
    return out


def _ncc3(v: np.ndarray, min_valid: float) -> np.ndarray:
    """:func:`_ncc` of cells 0 and 1 and of cells 1 and 2 of (k, 3, p) samples, (k, 2) [-]; a
    row valid in all three cells has each cell ranked once."""
    k, _, p = v.shape
    out = np.full((k, 2), np.nan)
    whole = np.isfinite(v).all(axis=(1, 2)) & (1.0 >= min_valid)
    if whole.any():
        r = _average_ranks(v[whole].reshape(-1, p)).reshape(-1, 3, p)
        out[whole, 0] = _ncc_ranked(r[:, 0], r[:, 1])
        out[whole, 1] = _ncc_ranked(r[:, 1], r[:, 2])
    if not whole.all():
        rest = ~whole
        out[rest, 0] = _ncc(v[rest, 0], v[rest, 1], min_valid)
        out[rest, 1] = _ncc(v[rest, 1], v[rest, 2], min_valid)
    return out


#: Window reads of the cell sampling are grouped by the square of this side [px] holding
#: their corner: one read and one interpolation per group.
_GROUP_PX = 256
#: Pitch cells whose samples are held at once (the temporaries stay bounded on a large site).
_BATCH = 512


def _sample_cells(read: Any, tiles: list[Any], gx: np.ndarray, gy: np.ndarray, stx: np.ndarray, sty: np.ndarray,
                  ks: tuple[int, ...]) -> np.ndarray:
    """Bilinear samples of the cells ``k`` pitches from each module's cell (``gx``, ``gy``:
    (m, nn, na) map points; ``stx``, ``sty``: each one's step [m]); (m, len(ks), nn * na).

    Each module's cells are read on the tile holding the mean of their points, through a
    window of their extent and 2 pixels around it; the windows of neighbouring modules are
    read together. The coordinates relative to a shared window differ from those relative to
    the module's own by a whole number of pixels (exactly: both are non-negative), so the
    samples are the same."""
    from scipy.ndimage import map_coordinates

    m = len(gx)
    px, py = np.empty((m, len(ks), *gx.shape[1:])), np.empty((m, len(ks), *gy.shape[1:]))
    for n, k in enumerate(ks):
        np.add(gx, k * stx[:, None, None], out=px[:, n])
        np.add(gy, k * sty[:, None, None], out=py[:, n])
    px, py = px.reshape(m, -1), py.reshape(m, -1)
    ti = np.zeros(m, np.int64)
    if len(tiles) > 1:
        for i in range(m):
            mx, my = float(np.mean(px[i])), float(np.mean(py[i]))
            ti[i] = next((j for j, t in enumerate(tiles)
                          if t.bounds.left <= mx <= t.bounds.right and t.bounds.bottom <= my <= t.bounds.top), 0)
    if m == 0 or (ti == ti[0]).all():  # one tile: the same products without the copies
        cols, rows = ~tiles[int(ti[0]) if m else 0].transform @ (px, py)
    else:
        cols, rows = np.empty_like(px), np.empty_like(py)
        for j in np.unique(ti):
            sel = ti == j
            cols[sel], rows[sel] = ~tiles[j].transform @ (px[sel], py[sel])
    c0 = np.floor(cols.min(axis=1)).astype(np.int64) - 2
    r0 = np.floor(rows.min(axis=1)).astype(np.int64) - 2
    c1 = np.ceil(cols.max(axis=1)).astype(np.int64) + 3
    r1 = np.ceil(rows.max(axis=1)).astype(np.int64) + 3
    inside = (c0 >= 0) & (r0 >= 0)
    # a window reaching beyond the top or left edge is read alone, as its own
    key = np.where(inside, (r0 // _GROUP_PX) * 1_000_003 + c0 // _GROUP_PX, -1 - np.arange(m))
    out = np.empty_like(px)
    groups: dict[tuple[int, int], list[int]] = {}
    for i, (j, kk) in enumerate(zip(ti.tolist(), key.tolist())):
        groups.setdefault((j, kk), []).append(i)
    for (j, _), members in groups.items():
        g = np.asarray(members)
        wc0, wr0 = int(c0[g].min()), int(r0[g].min())
        img = read(j, Window(wc0, wr0, int(c1[g].max()) - wc0, int(r1[g].max()) - wr0)).astype(np.float64)
        # pixel centres sit at half-integer pixel coordinates
        v = map_coordinates(img, [(rows[g] - wr0 - 0.5).ravel(), (cols[g] - wc0 - 0.5).ravel()], order=1,
                            mode="constant", cval=np.nan)
        out[g] = v.reshape(len(g), -1)
    return out.reshape(m, len(ks), -1)


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
    return _votes(orthos, placed, [lines], cfg)[0]


def _votes(orthos: Any, placed: gpd.GeoDataFrame, sets: list[list[tuple[int, int, int]]],
           cfg: Mapping[str, Any]) -> list[np.ndarray]:
    """:func:`end_votes` of several sets of lines."""
    return [v for v, _ in _read_ends(orthos, placed, sets, cfg)]


def _read_ends(orthos: Any, placed: gpd.GeoDataFrame, sets: list[list[tuple[int, int, int]]],
               cfg: Mapping[str, Any]) -> list[tuple[np.ndarray, np.ndarray]]:
    """:func:`end_votes` of several sets of lines and the moments of their end cells, in one
    pass over the ortho: the pitch cells are read band by band across the site (each band's
    chunks decoded once), the lines of one band and cell size together.

    Per set: the votes (len(lines), 2) and the moments (len(lines), 2, 4, 2): at the first end
    (0) cells 0, 1, 2, 3 and at the last (1) cells n + 1, n, n - 1, n - 2 (the cell beyond
    the end, the end module's, two inside), each one's mean and standard deviation of its
    samples [image units] (NaN: fewer than ``ends_min_valid`` of them valid)."""
    sizes = [len(v) for v in sets]
    lines = [t for v in sets for t in v]
    out = np.full((len(lines), 2), np.nan)
    mom = np.full((len(lines), 2, 4, 2), np.nan)
    if not lines:
        return [(out[:0], mom[:0]) for _ in sets]
    fr = placed[_FRAME].to_numpy(float)
    tiles = list(orthos.tiles)
    gsd = abs(float(tiles[0].transform.a))
    inset = float(cfg["ends_inset"])
    min_valid = float(cfg["ends_min_valid"])
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    first, last, n = np.asarray(lines, np.int64).reshape(-1, 3).T
    den = np.maximum(n - 1, 1).astype(float)
    stx, sty = (cx[last] - cx[first]) / den, (cy[last] - cy[first]) / den
    with np.errstate(invalid="ignore"):
        idx = np.nonzero(np.isfinite(stx) & np.isfinite(sty) & (np.hypot(stx, sty) > 0))[0]
    # the cells seen from each end of a line (item = line, end): from the first (end 0) cells
    # 0, 1, 2 (0: one pitch before it), from the last (end 1) cells n + 1, n, n - 1
    line = np.concatenate([idx, idx])
    end = np.repeat([0, 1], len(idx))
    pos = np.where(end == 0, first[line], last[line])
    na, nn = _cell_sizes(fr[pos], stx[line], sty[line], gsd, inset)
    band = np.floor(cy[pos] / (_GROUP_PX * gsd))
    order = np.lexsort((cx[pos], nn, na, end, band))
    key = np.column_stack([band, end, na, nn])[order]
    cut = np.nonzero(np.any(key[1:] != key[:-1], axis=1))[0] + 1
    # per line: NCC(cell 0, cell 1), NCC(cell 1, cell 2), NCC(cell n + 1, cell n), NCC(cell n,
    # cell n - 1)
    ncc = np.full((len(lines), 4), np.nan)
    cache = getattr(orthos, "window_cache", None)
    with cache() if cache is not None else contextlib.nullcontext(orthos.read) as read:
        for run in np.split(order, cut):
            e, size = int(end[run[0]]), (int(na[run[0]]), int(nn[run[0]]))
            ks, cols = ((-1, 0, 1, 2), [0, 1]) if e == 0 else ((1, 0, -1, -2), [2, 3])
            for lo in range(0, len(run), _BATCH):
                it = run[lo:lo + _BATCH]
                b = line[it]
                gx, gy = _cell_grids(fr[pos[it]], stx[b], sty[b], gsd, inset, *size)
                v = _sample_cells(read, tiles, gx, gy, stx[b], sty[b], ks)
                ncc[b[:, None], cols] = _ncc3(v[:, :3], min_valid)
                mom[b, e] = _moments(v, min_valid)
    out[:, 0] = ncc[:, 1] - ncc[:, 2]
    out[:, 1] = ncc[:, 3] - ncc[:, 0]
    cut_at = np.cumsum(sizes)[:-1]
    return list(zip(np.split(out, cut_at), np.split(mom, cut_at)))


def _moments(v: np.ndarray, min_valid: float) -> np.ndarray:
    """Mean and standard deviation of the valid samples of each cell of (k, c, p) samples,
    (k, c, 2) [image units]; NaN where fewer than ``min_valid`` of a cell's samples are valid."""
    ok = np.isfinite(v)
    cnt = ok.sum(axis=2)
    z = np.where(ok, v, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = z.sum(axis=2) / cnt
        var = np.where(ok, (v - mean[..., None]) ** 2, 0.0).sum(axis=2) / cnt
    use = (cnt >= min_valid * v.shape[2]) & (cnt > 0)
    return np.stack([np.where(use, mean, np.nan), np.where(use, np.sqrt(var), np.nan)], axis=-1)


def glass_votes(mom: np.ndarray, n: np.ndarray, free: np.ndarray) -> np.ndarray:
    """Per line of modules, how much more its end modules look like its glass than the cells
    beyond its ends do [-] (NaN: no free end read).

    A cell is compared with the line's own glass: the cells one and two modules inside each
    end (those within the line; a line of two modules has only its end modules), their median
    mean ``g`` and median standard deviation ``s``. A cell's distance from glass is
    ``|mean - g| / S + |ln(std / s)|`` (``S``: the median ``s`` of all the lines, so one flat
    line does not weigh more): ground beyond a table end is warmer or colder than the glass, or
    smoother or rougher, and a cell of glass is neither. At each free end (``free``: beyond
    the last, beyond the first, as :func:`free_ends`) the distance of the cell beyond the end
    less that of the end module's counts; the line's value is the mean of its free ends.

    The right placement puts glass in the end cells and no glass beyond them: a positive
    value. A placement one module pitch short of an end puts glass beyond it (both cells
    glass), one a pitch beyond an end puts ground in both: about zero either way, and a
    placement one pitch off along a line is one or the other at each of its ends."""
    k = len(mom)
    out = np.full(k, np.nan)
    if k == 0:
        return out
    mean, std = mom[..., 0], mom[..., 1]
    # cells inside the line: index 2 (one module inside) always, index 3 from three modules
    inner = np.zeros((k, 2, 4), bool)
    inner[:, :, 2] = True
    inner[:, :, 3] = (np.asarray(n) >= 3)[:, None]
    with np.errstate(invalid="ignore", divide="ignore"), _quiet():
        g = np.nanmedian(np.where(inner, mean, np.nan).reshape(k, -1), axis=1)
        s = np.nanmedian(np.where(inner, std, np.nan).reshape(k, -1), axis=1)
        scale = float(np.nanmedian(s)) if np.isfinite(s).any() else float("nan")
        if not (math.isfinite(scale) and scale > 0):
            return out
        floor = 1e-3 * scale
        dist = (np.abs(mean - g[:, None, None]) / scale
                + np.abs(np.log(np.maximum(std, floor) / np.maximum(s, floor)[:, None, None])))
        # ends: 0 the first (free column 1), 1 the last (free column 0)
        v = dist[:, :, 0] - dist[:, :, 1]
        v = np.where(np.column_stack([free[:, 1], free[:, 0]]), v, np.nan)
        out = np.nanmean(v, axis=1)
    return out


@contextlib.contextmanager
def _quiet() -> Any:
    """Silence numpy's warnings about all-NaN slices (a line with no free end is NaN)."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        yield


def _spread_subset(lines: list[tuple[int, int, int]], most: int) -> list[tuple[int, int, int]]:
    """At most ``most`` of ``lines``, evenly spaced through their order (table by table, so
    across the whole site); all of them when there are no more (``most`` 0: all)."""
    if most <= 0 or len(lines) <= most:
        return lines
    keep = np.unique(np.round(np.linspace(0, len(lines) - 1, most)).astype(np.int64))
    return [lines[i] for i in keep.tolist()]


def sunlit_ends(placed: gpd.GeoDataFrame, lines: list[tuple[int, int, int]], sun: tuple[float, ...] | None,
                shadow_cos: float) -> np.ndarray | None:
    """Whether the place beyond each end of each line is clear of the table's own shadow [bool].

    (len(lines), 2), the columns of :func:`free_ends` (beyond the last module, beyond the
    first). A raised table's shadow falls away from the sun (``sun``: east, north, elevation
    [deg], :func:`pvscan.measure.register.evidence.sun_vector`): the end whose outward
    direction makes a cosine above ``shadow_cos`` [-] with the horizontal direction away
    from the sun has the shadow beyond it, cool and even like glass. None when the sun is not
    known or below the horizon; every end when it stands at the zenith (no shadow beyond an
    end)."""
    if sun is None or len(sun) < 3 or not float(sun[2]) > 0.0:
        return None
    out = np.ones((len(lines), 2), bool)
    h = math.hypot(float(sun[0]), float(sun[1]))
    if not lines or h == 0.0:
        return out
    away = -np.array([float(sun[0]), float(sun[1])]) / h
    fr = placed[_FRAME].to_numpy(float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    first, last, _ = np.asarray(lines, np.int64).reshape(-1, 3).T
    dx, dy = cx[last] - cx[first], cy[last] - cy[first]
    with np.errstate(invalid="ignore", divide="ignore"):
        cos = (dx * away[0] + dy * away[1]) / np.hypot(dx, dy)
    # beyond the last module the line runs on (+), beyond the first it runs back (-)
    out[:, 0] = ~(cos > shadow_cos)
    out[:, 1] = ~(-cos > shadow_cos)
    return out


def judge_ends(orthos: Any, modules: gpd.GeoDataFrame, placed: gpd.GeoDataFrame,
               cfg: Mapping[str, Any], sun: tuple[float, ...] | None = None) -> dict[str, Any]:
    """Whether the table ends confirm a placement against one module pitch either way.

    Parameters
    ----------
    orthos : OrthoSet
    modules : geopandas.GeoDataFrame
        The layout's modules (table ids, rows and columns) [m].
    placed : geopandas.GeoDataFrame
        The same modules, in the same order, where the placement puts them [m].
    cfg : mapping
        ``[register]`` settings (``ends_inset``, ``ends_min_valid``, ``ends_min_vote``,
        ``ends_max_lines``: a large site votes with that many lines a direction, evenly spread).

    Returns
    -------
    dict
        Per direction (``along``, ``across`` the table rows, when the tables have lines of
        modules that way): the median vote against one pitch forward and one back over the
        lines, and the number of lines that voted [-]; ``lowest`` (the lowest of those medians, None
        when no line could be read), ``limit`` (``ends_min_vote``) and ``decisive``
        (``lowest`` above ``limit``, or nothing to read: the ends do not prefer a placement
        one pitch away).
    """
    lines = {name: _spread_subset(v, int(cfg["ends_max_lines"])) for name, v in end_lines(modules).items()}
    out: dict[str, Any] = {}
    meds: list[float] = []
    names = [name for name in ("along", "across") if lines[name]]
    read = dict(zip(names, _read_ends(orthos, placed, [lines[name] for name in names], cfg)))
    glass: dict[str, Any] = {}
    for name in names:
        v, mom = read[name]
        free = free_ends(modules, lines[name], float(cfg["ends_clear_m"]))
        v[~free] = np.nan
        m = []
        for j in range(2):
            col = v[:, j][np.isfinite(v[:, j])]
            m.append(float(np.median(col)) if len(col) else float("nan"))
        out[name] = {"votes": [round(x, 4) if math.isfinite(x) else None for x in m],
                     "lines": int(np.isfinite(v).all(axis=1).sum())}
        meds += [x for x in m if math.isfinite(x)]
        lit = sunlit_ends(placed, lines[name], sun, float(cfg["ends_glass_shadow_cos"]))
        if lit is None:
            continue
        gv = glass_votes(mom, np.asarray([t[2] for t in lines[name]], np.int64), free & lit)
        gv = gv[np.isfinite(gv)]
        if len(gv):
            glass[name] = {"vote": round(float(np.median(gv)), 4), "lines": len(gv)}
    lim = float(cfg["ends_min_vote"])
    low = min(meds) if meds else None
    g_low = min((g["vote"] for g in glass.values()), default=None)
    out.update(lowest=round(low, 4) if low is not None else None, limit=lim,
               decisive=bool(low is None or low > lim),
               glass={**glass, "lowest": g_low, "limit": float(cfg["ends_glass_vote"])})
    return out


def pitch_steps(modules: gpd.GeoDataFrame) -> tuple[list[str], list[np.ndarray]]:
    """The placements one module pitch away, as steps [m] and their directions: one pitch forward
    and one back along a table row (``along``) and across it (``across``), as the tables have."""
    from pvscan.measure.register._pitch import _named_pitches

    named = _named_pitches(modules)
    return ([name for name in named for _ in (1.0, -1.0)],
            [s * v for v in named.values() for s in (1.0, -1.0)])


def glass_decides(glass: Mapping[str, Any], dirs: list[str], ratios: list[float], cfg: Mapping[str, Any]) -> bool:
    """Whether every direction of one-pitch alternatives is told apart, by the module evidence
    or by the glass at the sunlit table ends.

    ``ratios``: the module evidence of each placement one pitch away over the placement's [-],
    ``dirs`` its direction (``along``, ``across``; NaN: not read); ``glass``: :func:`judge_ends`'s
    ``glass`` (per direction the median :func:`glass_votes` of the lines). A direction is told
    apart when its ratio is above ``1 + pitch_min_margin`` (the module evidence decides), or
    when its glass vote is at least ``ends_glass_vote`` and its ratio at least
    ``ends_glass_ratio`` [-]."""
    by_dir: dict[str, float] = {}
    for d, r in zip(dirs, ratios):
        ok = math.isfinite(r) and math.isfinite(by_dir.get(d, 0.0))
        by_dir[d] = min(by_dir.get(d, math.inf), r) if ok else math.nan
    if not by_dir or len(ratios) != len(dirs):
        return False
    margin = 1.0 + float(cfg["pitch_min_margin"])
    need, floor = float(cfg["ends_glass_vote"]), float(cfg["ends_glass_ratio"])
    for name, r in by_dir.items():
        g = (glass.get(name) or {}).get("vote") if isinstance(glass.get(name), Mapping) else None
        if r > margin:
            continue
        if g is None or not (g >= need and r >= floor):
            return False
    return True
