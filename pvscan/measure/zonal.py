"""Zonal statistics: per module, per cell and per bypass-diode substring, in one pass.

Method
------
The raster is processed block by block (blocks aligned with the file's internal tiling,
``[zonal] block_px`` in size). Each module is assigned to the block that contains the
centre of its measuring footprint; the window read for a block is enlarged to contain the
bounding boxes of all its modules, so no state crosses blocks and memory is bounded by
the block size. In each window:

1. the modules' footprints (shrunk by the edge margins, grown by a quarter pixel so no
   pixel centre on the boundary is lost) are burnt as local labels with
   :func:`rasterio.features.rasterize`;
2. the labelled pixel centres are mapped to module-local ``(u, v)`` with per-label affine
   coefficients (gathered by label); pixels outside ``[mu, 1-mu] x [mv, 1-mv]`` are
   dropped, so the footprint is exactly the pixel centres of the shrunk frame;
3. cell ``(floor(u * n_along), floor(v * n_across))`` and substring
   ``floor(v * bypass_diodes)`` indices are computed;
4. values are quantised (``[zonal] quantum_k``, 0.01 K) and combined with the group id
   into one integer key (int32 when it fits, else int64); one sort per grouping
   (module, cell, substring) yields every group's order statistics, read with linear
   interpolation between order statistics (the default of :func:`numpy.percentile`);
   counts, means and standard deviations come from :func:`numpy.bincount`.

There are no per-polygon loops. Blocks are visited in strips of a few block columns so
the tiles neighbouring windows share are still in GDAL's bounded block cache, and are
processed on ``[zonal] workers`` threads (each with its own dataset handles; results are
merged in block order, so they do not depend on the number of threads). Memory is
bounded by ``workers`` blocks plus the result arrays (12 bytes per cell of each module).

A module seen by several tiles is measured from the tile with the most valid pixels
(ties: the lower tile index). All temperatures are *apparent* [degC], as the ortho holds
them; :mod:`pvscan.physics.radiometry` converts them afterwards. Footprints of different modules
should not overlap (as in a real layout); where they do, a pixel goes to the later module.
"""
from __future__ import annotations

import logging
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from affine import Affine
from rasterio.features import rasterize
from rasterio.windows import Window

from pvscan.io.ortho import WARNINGS_LOCK, _zonal_section

__all__ = ["ZonalStats", "zonal_stats", "measure_window", "TABLE_COLUMNS"]

log = logging.getLogger(__name__)

FRAME_COLUMNS = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]
TABLE_COLUMNS = [
    "t_mean_c",
    "t_median_c",
    "t_p95_c",
    "t_max_c",
    "t_min_c",
    "t_std_k",
    "valid_fraction",
    "n_pixels",
    "tile",
]
#: Probabilities of the order statistics reported: median and 95th percentile.
_PROBS = (0.5, 0.95)
#: Fraction of a pixel the burnt footprint is grown by, so boundary centres are kept.
_GROW_PX = 0.25
#: Block columns per strip of the processing order (see ``_plan``).
_STRIP_BLOCKS = 4


@dataclass
class ZonalStats:
    """Statistics of the apparent temperature of each module.

    Attributes
    ----------
    table : pandas.DataFrame
        Aligned with the modules (same index): ``t_mean_c``, ``t_median_c``, ``t_p95_c``,
        ``t_max_c``, ``t_min_c`` [degC], ``t_std_k`` [K] (population standard deviation),
        ``valid_fraction`` [-] (valid pixels / pixel centres in the shrunk footprint),
        ``n_pixels`` (valid pixels measured) and ``tile`` (index of the tile measured, -1
        when the module is outside every tile). NaN statistics where no pixel is valid.
    cell_median, cell_p95 : numpy.ndarray
        float32 (n_modules, n_along, n_across) [degC], NaN where a cell has no valid
        pixel; cell (i, j) = (floor(u * n_along), floor(v * n_across)).
    cell_count : numpy.ndarray
        int32 (n_modules, n_along, n_across): valid pixels per cell.
    sub_median, sub_p95 : numpy.ndarray
        float32 (n_modules, bypass_diodes) [degC]; substring k = floor(v * bypass_diodes),
        the strip running the full length of the module.
    shift : tuple of float
        (dx, dy) [m] added to the frames before measuring.
    quantum_k : float
        Quantisation step of the order statistics [K].
    """

    table: pd.DataFrame
    cell_median: np.ndarray
    cell_p95: np.ndarray
    cell_count: np.ndarray
    sub_median: np.ndarray
    sub_p95: np.ndarray
    shift: tuple[float, float] = (0.0, 0.0)
    quantum_k: float = 0.01
    settings: Mapping = field(default_factory=dict)

    @property
    def n_along(self) -> int:
        return int(self.cell_median.shape[1])

    @property
    def n_across(self) -> int:
        return int(self.cell_median.shape[2])

    @property
    def bypass_diodes(self) -> int:
        return int(self.sub_median.shape[1])

    def __len__(self) -> int:
        return len(self.table)


# --------------------------------------------------------------------------- helpers
def _grid(module_spec: Any) -> tuple[int, int, int]:
    """(n_along, n_across, bypass_diodes) of a ModuleSpec-like object or mapping."""

    def get(key, default=None):
        if isinstance(module_spec, Mapping):
            return module_spec.get(key, default)
        return getattr(module_spec, key, default)

    n_along = get("n_along")
    if n_along is None:
        n_along = int(get("cells_along")) * (2 if get("half_cut", False) else 1)
    n_across = get("n_across")
    if n_across is None:
        n_across = int(get("cells_across"))
    nsub = int(get("bypass_diodes"))
    n_along, n_across = int(n_along), int(n_across)
    if n_along < 1 or n_across < 1 or nsub < 1:
        raise ValueError(f"module cell grid {n_along} x {n_across} with {nsub} substrings is not valid")
    return n_along, n_across, nsub


def _frames(modules: Any, shift: tuple[float, float]) -> np.ndarray:
    """(n, 6) float64 frames (fx0, fy0, fux, fuy, fvx, fvy) [m], shifted by (dx, dy)."""
    if isinstance(modules, np.ndarray):
        fr = np.array(modules, dtype=np.float64, copy=True).reshape(-1, 6)
    else:
        missing = [c for c in FRAME_COLUMNS if c not in modules.columns]
        if missing:
            raise KeyError(f"modules frame lacks the module-local frame columns {missing}")
        fr = modules[FRAME_COLUMNS].to_numpy(dtype=np.float64, copy=True)
    fr[:, 0] += float(shift[0])
    fr[:, 1] += float(shift[1])
    return fr


def _frame_corners(fr: np.ndarray, u0, u1, v0, v1) -> tuple[np.ndarray, np.ndarray]:
    """Map coordinates (n, 4) of the local rectangle [u0,u1] x [v0,v1] of each frame."""
    u = np.stack([u0, u1, u1, u0], axis=-1) if np.ndim(u0) else np.array([u0, u1, u1, u0])
    v = np.stack([v0, v0, v1, v1], axis=-1) if np.ndim(v0) else np.array([v0, v0, v1, v1])
    x = fr[:, 0:1] + u * fr[:, 2:3] + v * fr[:, 4:5]
    y = fr[:, 1:2] + u * fr[:, 3:4] + v * fr[:, 5:6]
    return x, y


def _group_quantiles(skey, counts, qbits, probs=_PROBS, extremes=False):
    """Order statistics of groups from keys sorted by (group, quantised value).

    ``skey`` are the sorted keys ``group << qbits | q`` and ``counts`` the number of keys
    of each group (index = group). Returns the quantised values (float64, NaN for empty
    groups) of each probability, interpolated linearly between order statistics like
    ``numpy.percentile``'s default, and optionally the group minima and maxima. Only
    O(groups) gathers: no pass over the keys.
    """
    ngroups = counts.size
    mask = (1 << qbits) - 1
    ends = np.cumsum(counts)
    nz = np.flatnonzero(counts)
    c = counts[nz]
    st = ends[nz] - c
    out = []
    for p in probs:
        pos = (c - 1) * p
        lo = np.floor(pos).astype(np.int64)
        frac = pos - lo
        hi = np.minimum(lo + 1, c - 1)
        qlo = (skey[st + lo] & mask).astype(np.float64)
        qhi = (skey[st + hi] & mask).astype(np.float64)
        r = np.full(ngroups, np.nan)
        r[nz] = qlo + frac * (qhi - qlo)
        out.append(r)
    if extremes:
        mn = np.full(ngroups, np.nan)
        mx = np.full(ngroups, np.nan)
        mn[nz] = skey[st] & mask
        mx[nz] = skey[st + c - 1] & mask
        out.extend([mn, mx])
    return out


@dataclass
class _BlockResult:
    index: np.ndarray  # global module indices
    n_fp: np.ndarray
    n_valid: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    median: np.ndarray
    p95: np.ndarray
    tmin: np.ndarray
    tmax: np.ndarray
    cell_median: np.ndarray  # (m, ncell)
    cell_p95: np.ndarray
    cell_count: np.ndarray
    sub_median: np.ndarray  # (m, nsub)
    sub_p95: np.ndarray


def measure_window(
    data: np.ndarray,
    transform: Affine,
    frames: np.ndarray,
    grid: tuple[int, int, int],
    margins: tuple[float, float] = (0.0, 0.0),
    quantum_k: float = 0.01,
) -> dict[str, np.ndarray]:
    """Statistics of the modules inside one raster window (a pure array function).

    Parameters
    ----------
    data : numpy.ndarray
        2-D apparent temperature of the window [degC], NaN where invalid.
    transform : affine.Affine
        Map transform of the window (not rotated) [m].
    frames : numpy.ndarray
        (m, 6) module-local frames (fx0, fy0, fux, fuy, fvx, fvy) [m].
    grid : tuple of int
        (n_along, n_across, bypass_diodes).
    margins : tuple of float
        Edge margins (mu, mv) [-]: pixel centres with u in [mu, 1 - mu] and v in
        [mv, 1 - mv] are measured.
    quantum_k : float
        Quantisation step of the order statistics [K].

    Returns
    -------
    dict of numpy.ndarray
        ``n_fp`` (pixel centres in the footprint), ``n_valid``, ``mean``, ``std``,
        ``median``, ``p95``, ``min``, ``max`` (m,) and ``cell_median``, ``cell_p95``,
        ``cell_count`` (m, n_along, n_across), ``sub_median``, ``sub_p95`` (m, nsub).
        Temperatures [degC], standard deviation [K].
    """
    r = _measure(np.asarray(data), transform, np.asarray(frames, dtype=np.float64), grid, margins, quantum_k)
    n_along, n_across, nsub = grid
    m = len(r.n_fp)
    return {
        "n_fp": r.n_fp,
        "n_valid": r.n_valid,
        "mean": r.mean,
        "std": r.std,
        "median": r.median,
        "p95": r.p95,
        "min": r.tmin,
        "max": r.tmax,
        "cell_median": r.cell_median.reshape(m, n_along, n_across),
        "cell_p95": r.cell_p95.reshape(m, n_along, n_across),
        "cell_count": r.cell_count.reshape(m, n_along, n_across),
        "sub_median": r.sub_median,
        "sub_p95": r.sub_p95,
    }


def _measure(data, transform, fr, grid, margins, quantum_k, index=None) -> _BlockResult:
    n_along, n_across, nsub = grid
    ncell = n_along * n_across
    mu, mv = float(margins[0]), float(margins[1])
    m = len(fr)
    H, W = data.shape
    a, c, e, f = transform.a, transform.c, transform.e, transform.f
    nan = np.full(m, np.nan)

    def empty():
        return _BlockResult(
            index=np.arange(m) if index is None else index,
            n_fp=np.zeros(m, np.int64),
            n_valid=np.zeros(m, np.int64),
            mean=nan.copy(), std=nan.copy(), median=nan.copy(), p95=nan.copy(),
            tmin=nan.copy(), tmax=nan.copy(),
            cell_median=np.full((m, ncell), np.nan, np.float32),
            cell_p95=np.full((m, ncell), np.nan, np.float32),
            cell_count=np.zeros((m, ncell), np.int32),
            sub_median=np.full((m, nsub), np.nan, np.float32),
            sub_p95=np.full((m, nsub), np.nan, np.float32),
        )  # fmt: skip

    if m == 0 or H == 0 or W == 0:
        return empty()

    # 1. burn local labels 1..m of the shrunk footprints, grown by a fraction of a pixel
    lu = np.hypot(fr[:, 2], fr[:, 3])
    lv = np.hypot(fr[:, 4], fr[:, 5])
    det = fr[:, 2] * fr[:, 5] - fr[:, 4] * fr[:, 3]
    ok = np.isfinite(fr).all(axis=1) & (lu > 0) & (lv > 0)
    ok &= np.abs(det) > 1e-12 * np.where(ok, lu * lv, 1.0)
    grow = _GROW_PX * max(abs(a), abs(e))
    with np.errstate(divide="ignore", invalid="ignore"):
        gu = np.where(ok, grow / lu, 0.0)
        gv = np.where(ok, grow / lv, 0.0)
    x, y = _frame_corners(fr, mu - gu, 1 - mu + gu, mv - gv, 1 - mv + gv)
    ring = np.stack([x, y], axis=-1)[:, [0, 1, 2, 3, 0]].tolist()
    shapes = [({"type": "Polygon", "coordinates": [ring[i]]}, i + 1) for i in np.flatnonzero(ok).tolist()]
    if not shapes:
        return empty()
    with WARNINGS_LOCK:  # rasterio switches warning filters inside rasterize
        labels = rasterize(shapes, out_shape=(H, W), transform=transform, fill=0,
                           dtype="uint16" if m < 65535 else "int32")
    flat = labels.ravel()
    idx = np.flatnonzero(flat != 0)
    if idx.size == 0:
        return empty()
    lab16 = flat.take(idx)
    n = idx.size
    # Runs: consecutive labelled pixels of one label on one scanline. Along a run u and v
    # grow linearly with the column, so the per-label coefficients are gathered once per
    # run and expanded with np.repeat (cheaper than a gather per pixel).
    newrun = np.empty(n, dtype=bool)
    newrun[0] = True
    np.not_equal(lab16[1:], lab16[:-1], out=newrun[1:])
    newrun[1:] |= np.diff(idx) != 1
    last, first = labels[:-1, -1], labels[1:, 0]
    wrap = np.flatnonzero((last != 0) & (last == first)) + 1  # a label wrapping a row end
    if wrap.size:
        newrun[np.searchsorted(idx, wrap * W)] = True
    del labels, flat
    starts = np.flatnonzero(newrun)
    del newrun
    lengths = np.diff(np.append(starts, n))
    s_idx = idx[starts]
    r_run = s_idx // W
    c_run = (s_idx - r_run * W).astype(np.float64)
    r_run = r_run.astype(np.float64)
    l_run = lab16.take(starts).astype(np.intp)
    lab = lab16.astype(np.intp)  # 1..m; 0 is used below as the "not measured" group
    del lab16

    # 2. pixel centres -> (u, v) with per-label affine coefficients in (col, row)
    with np.errstate(divide="ignore", invalid="ignore"):
        iux, iuy = fr[:, 5] / det, -fr[:, 4] / det
        ivx, ivy = -fr[:, 3] / det, fr[:, 2] / det
    dx0 = c + 0.5 * a - fr[:, 0]
    dy0 = f + 0.5 * e - fr[:, 1]

    def table(vec):  # row 0 is a dummy for label 0
        return np.concatenate([[0.0], np.where(ok, vec, 0.0)])

    pos = np.arange(n, dtype=np.float64)
    pos0 = starts.astype(np.float64)
    # u at position p of the run starting at p0: u0 + du * (p - p0) = (u0 - du * p0) + du * p
    du = table(iux * a).take(l_run)
    u0 = du * c_run + table(iuy * e).take(l_run) * r_run + table(iux * dx0 + iuy * dy0).take(l_run)
    u = np.repeat(du, lengths)
    u *= pos
    u += np.repeat(u0 - du * pos0, lengths)
    dv = table(ivx * a).take(l_run)
    v0 = dv * c_run + table(ivy * e).take(l_run) * r_run + table(ivx * dx0 + ivy * dy0).take(l_run)
    v = np.repeat(dv, lengths)
    v *= pos
    v += np.repeat(v0 - dv * pos0, lengths)
    del pos, pos0, du, u0, dv, v0, starts, lengths, s_idx, r_run, c_run, l_run
    inside = u >= mu
    inside &= u <= 1.0 - mu
    inside &= v >= mv
    inside &= v <= 1.0 - mv
    vals = data.ravel().take(idx).astype(np.float64)
    del idx
    n_fp = np.bincount(lab[inside], minlength=m + 1)[1:]
    good = np.isfinite(vals)
    good &= inside
    del inside
    res = empty()
    res.n_fp = n_fp
    if not good.any():
        return res
    # pixels not measured (outside the shrunk frame, or NaN) go to group 0, a dummy
    lab *= good
    labg = lab
    del lab
    # ... with in-range values, so their keys stay inside group 0
    notgood = ~good
    np.copyto(vals, float(vals[np.argmax(good)]), where=notgood)
    np.copyto(u, 0.5, where=notgood)
    np.copyto(v, 0.5, where=notgood)
    del good, notgood

    # 3. counts, means and standard deviations by label (two passes: no cancellation)
    n_valid = np.bincount(labg, minlength=m + 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(labg, weights=vals, minlength=m + 1) / n_valid
        dev = vals - mean.take(labg)
        dev *= dev
        std = np.sqrt(np.bincount(labg, weights=dev, minlength=m + 1) / n_valid)
    del dev

    # 4. cell / substring indices, quantised values, one sort per grouping on combined
    # integer keys (int32 when they fit: sorting them is about twice as fast)
    q = vals
    q *= 1.0 / quantum_k
    np.rint(q, out=q)
    qmin = float(q.min())
    q -= qmin
    qbits = max(1, int(q.max()).bit_length())
    kbits = ((m + 1) * ncell).bit_length() + qbits
    if kbits > 62:
        raise ValueError("temperature range too wide for the quantised sort key; raise quantum_k")
    kt = np.int32 if kbits <= 31 else np.int64
    q = q.astype(kt)
    del vals
    # measured pixels have mu <= u <= 1 - mu, so floor(u * n) <= n - 1 unless mu == 0
    u *= n_along
    ci = u.astype(kt)
    del u
    if mu <= 0.0:
        np.minimum(ci, n_along - 1, out=ci)
    sk = (v * nsub).astype(kt)
    v *= n_across
    cj = v.astype(kt)
    del v
    if mv <= 0.0:
        np.minimum(sk, nsub - 1, out=sk)
        np.minimum(cj, n_across - 1, out=cj)
    labk = labg.astype(kt)
    del labg

    # module: key = label << qbits | q
    key = labk << qbits
    key |= q
    key.sort()
    med, p95, mn, mx = _group_quantiles(key, n_valid, qbits, extremes=True)
    # cell: group = (label * n_along + i) * n_across + j
    g = labk * n_along
    g += ci
    g *= n_across
    g += cj
    del ci, cj
    ccount = np.bincount(g, minlength=(m + 1) * ncell)
    g <<= qbits
    g |= q
    g.sort()
    cmed, cp95 = _group_quantiles(g, ccount, qbits)
    # substring: group = label * nsub + k
    g = np.multiply(labk, nsub, out=key)
    g += sk
    del sk
    scount = np.bincount(g, minlength=(m + 1) * nsub)
    g <<= qbits
    g |= q
    g.sort()
    smed, sp95 = _group_quantiles(g, scount, qbits)
    del g, q, key

    def to_c(arr, lo):
        return (arr[lo:] + qmin) * quantum_k

    res.n_valid = n_valid[1:]
    res.mean = mean[1:]
    res.std = std[1:]
    empty_mod = res.n_valid == 0
    res.mean[empty_mod] = np.nan
    res.std[empty_mod] = np.nan
    res.median = to_c(med, 1)
    res.p95 = to_c(p95, 1)
    res.tmin = to_c(mn, 1)
    res.tmax = to_c(mx, 1)
    res.cell_median = to_c(cmed, ncell).astype(np.float32).reshape(m, ncell)
    res.cell_p95 = to_c(cp95, ncell).astype(np.float32).reshape(m, ncell)
    res.cell_count = ccount[ncell:].astype(np.int32).reshape(m, ncell)
    res.sub_median = to_c(smed, nsub).astype(np.float32).reshape(m, nsub)
    res.sub_p95 = to_c(sp95, nsub).astype(np.float32).reshape(m, nsub)
    return res


# --------------------------------------------------------------------------- planning
@dataclass(frozen=True)
class _Job:
    tile: int
    window: Window
    modules: np.ndarray  # global indices


def _plan(orthos, fr: np.ndarray, margins, block_px: int) -> list[_Job]:
    """Assign modules to blocks of each tile they touch; one job per non-empty block."""
    mu, mv = margins
    ok = np.isfinite(fr).all(axis=1)
    x, y = _frame_corners(np.where(ok[:, None], fr, 0.0), mu, 1 - mu, mv, 1 - mv)
    cx, cy = x.mean(axis=1), y.mean(axis=1)
    jobs: list[_Job] = []
    for t in orthos.tiles:
        tr = t.transform
        cols = (x - tr.c) / tr.a
        rows = (y - tr.f) / tr.e
        c0 = np.floor(cols.min(axis=1)).astype(np.int64) - 1
        c1 = np.ceil(cols.max(axis=1)).astype(np.int64) + 1
        r0 = np.floor(rows.min(axis=1)).astype(np.int64) - 1
        r1 = np.ceil(rows.max(axis=1)).astype(np.int64) + 1
        touches = ok & (c1 > 0) & (c0 < t.width) & (r1 > 0) & (r0 < t.height)
        too_big = touches & (((c1 - c0) > 8 * block_px) | ((r1 - r0) > 8 * block_px))
        if too_big.any():
            log.warning(
                "%d module frame(s) larger than %d px skipped on %s (first: module index %d)",
                int(too_big.sum()), 8 * block_px, t.path.name, int(np.flatnonzero(too_big)[0]),
            )  # fmt: skip
            touches &= ~too_big
        sel = np.flatnonzero(touches)
        if sel.size == 0:
            continue
        bh, bw = orthos.block_shape(t.index, block_px)
        nbr = -(-t.height // bh)
        nbc = -(-t.width // bw)
        ccol = (cx[sel] - tr.c) / tr.a
        crow = (cy[sel] - tr.f) / tr.e
        bi = np.clip(np.floor(crow / bh).astype(np.int64), 0, nbr - 1)
        bj = np.clip(np.floor(ccol / bw).astype(np.int64), 0, nbc - 1)
        # strip-major order: strips of _STRIP_BLOCKS block columns, row by row inside a
        # strip, so the halo tiles a window shares with its neighbours are still in
        # GDAL's (bounded) block cache whatever the width of the ortho
        bid = (bj // _STRIP_BLOCKS) * (nbr * _STRIP_BLOCKS) + bi * _STRIP_BLOCKS + bj % _STRIP_BLOCKS
        order = np.argsort(bid, kind="stable")
        sel, bid = sel[order], bid[order]
        cuts = np.flatnonzero(np.diff(bid)) + 1
        starts = np.concatenate([[0], cuts])
        ends = np.concatenate([cuts, [sel.size]])
        wr0 = np.minimum.reduceat(r0[sel], starts)
        wr1 = np.maximum.reduceat(r1[sel], starts)
        wc0 = np.minimum.reduceat(c0[sel], starts)
        wc1 = np.maximum.reduceat(c1[sel], starts)
        for k in range(starts.size):
            win = Window(int(wc0[k]), int(wr0[k]), int(wc1[k] - wc0[k]), int(wr1[k] - wr0[k]))
            jobs.append(_Job(t.index, win, sel[starts[k] : ends[k]]))
    return jobs


class _Accumulator:
    """Keeps, for each module, the result of the tile with the most valid pixels."""

    def __init__(self, n: int, grid: tuple[int, int, int]):
        n_along, n_across, nsub = grid
        ncell = n_along * n_across
        self.best = np.full(n, -1, np.int64)
        self.tile = np.full(n, -1, np.int64)
        self.n_fp = np.zeros(n, np.int64)
        self.cols = {k: np.full(n, np.nan) for k in ("mean", "std", "median", "p95", "tmin", "tmax")}
        self.cell_median = np.full((n, ncell), np.nan, np.float32)
        self.cell_p95 = np.full((n, ncell), np.nan, np.float32)
        self.cell_count = np.zeros((n, ncell), np.int32)
        self.sub_median = np.full((n, nsub), np.nan, np.float32)
        self.sub_p95 = np.full((n, nsub), np.nan, np.float32)

    def merge(self, tile: int, r: _BlockResult) -> None:
        # most valid pixels wins; ties go to the lower tile index, whatever the merge order
        best = self.best[r.index]
        better = (r.n_valid > best) | ((r.n_valid == best) & (tile < self.tile[r.index]))
        if not better.any():
            return
        gi = r.index[better]
        self.best[gi] = r.n_valid[better]
        self.tile[gi] = tile
        self.n_fp[gi] = r.n_fp[better]
        for k in self.cols:
            self.cols[k][gi] = getattr(r, k)[better]
        self.cell_median[gi] = r.cell_median[better]
        self.cell_p95[gi] = r.cell_p95[better]
        self.cell_count[gi] = r.cell_count[better]
        self.sub_median[gi] = r.sub_median[better]
        self.sub_p95[gi] = r.sub_p95[better]


def _run_block(reader, job: _Job, fr, grid, margins, quantum_k, transform) -> _BlockResult:
    data = reader(job.tile, job.window)
    return _measure(data, transform, fr[job.modules], grid, margins, quantum_k, index=job.modules)


def _block_task(tile, window, fr_sub, index, grid, margins, quantum_k, cache_mb):
    """One block as a task (opens the file itself; see :func:`pvscan.tasks.run_tasks`)."""
    from pvscan.io.ortho import read_window

    data = read_window(tile, window, cache_mb=cache_mb)
    return _measure(data, tile.window_transform(window), fr_sub, grid, margins, quantum_k, index=index)


# --------------------------------------------------------------------------- public API
def zonal_stats(
    orthos,
    modules,
    module_spec,
    settings: Any = None,
    *,
    shift: tuple[float, float] = (0.0, 0.0),
    progress: Callable[[str, int, int], None] | None = None,
    scheduler: str | None = None,
    workers: int | None = None,
    prefetch: bool = True,
) -> ZonalStats:
    """Apparent-temperature statistics of every module, cell and substring.

    Parameters
    ----------
    orthos : pvscan.io.ortho.OrthoSet
        The open ortho tiles of the flight (values in apparent temperature [degC]).
    modules : geopandas.GeoDataFrame or pandas.DataFrame
        One row per module with the module-local frame columns ``fx0, fy0, fux, fuy,
        fvx, fvy`` [m] in the ortho's CRS (see :mod:`pvscan.io.layout`).
    module_spec : ModuleSpec or mapping
        Gives ``n_along`` / ``n_across`` (or ``cells_along``, ``cells_across``,
        ``half_cut``) and ``bypass_diodes``.
    settings : Pipeline or mapping, optional
        The pipeline or its ``[zonal]`` section: ``edge_margin_u``, ``edge_margin_v`` [-],
        ``block_px`` [px], ``quantum_k`` [K], ``workers``. Default: the default pipeline.
    shift : (float, float)
        (dx, dy) [m] added to every frame before measuring (co-registration result).
    progress : callable, optional
        Called as ``progress("zonal", done_blocks, total_blocks)``.
    scheduler : None, {"synchronous", "threads", "processes"}, address or distributed.Client, optional
        None: the single-machine block loop. Otherwise each block is a task
        (:func:`pvscan.tasks.run_tasks`) that opens the file itself: in this process, on a
        pool of local threads or processes, or on a Dask distributed cluster (a
        ``tcp://host:port`` address or a connected ``Client``; the workers must see the
        ortho's files by the same paths). Results are identical on every scheduler.
    workers : int, optional
        Threads of the single-machine path (default ``[zonal] workers``). With more than
        one, blocks are read and reduced on a thread pool (GDAL decoding and numpy's
        heavy loops release the GIL); results are identical to one thread.
    prefetch : bool
        One worker only: read the next block on a helper thread while the current one
        is reduced.

    Returns
    -------
    ZonalStats

    Notes
    -----
    The measuring footprint of a module is the set of pixel centres with local
    coordinates u in [mu, 1 - mu] and v in [mv, 1 - mv] (the edge margins). Medians and
    95th percentiles are computed on values quantised to ``quantum_k`` and interpolated
    linearly between order statistics, as :func:`numpy.percentile` does by default;
    minima and maxima are quantised too; means and standard deviations are exact.
    """
    cfg = _zonal_section(settings)
    mu = float(cfg.get("edge_margin_u", 0.0))
    mv = float(cfg.get("edge_margin_v", 0.0))
    block_px = int(cfg.get("block_px", 1024))
    quantum_k = float(cfg.get("quantum_k", 0.01))
    workers = int(cfg.get("workers", 1) if workers is None else workers)
    grid = _grid(module_spec)
    fr = _frames(modules, shift)
    n = len(fr)
    margins = (mu, mv)
    jobs = _plan(orthos, fr, margins, block_px)
    total = len(jobs)
    acc = _Accumulator(n, grid)
    log.debug("zonal: %d modules, %d blocks on %d tile(s)", n, total, len(orthos.tiles))
    if progress is not None:
        progress("zonal", 0, total)

    if scheduler is None:
        tiles = orthos.tiles

        def transform_of(job):
            return tiles[job.tile].window_transform(job.window)

        if workers > 1 and total > 1:
            # blocks on a pool of threads, each with its own dataset handles; numpy and
            # GDAL release the GIL in the heavy parts. Results are merged in job order.
            def task(job):
                data = read(job.tile, job.window)
                return _measure(data, transform_of(job), fr[job.modules], grid, margins, quantum_k, job.modules)

            with orthos.reader() as read, ThreadPoolExecutor(workers, thread_name_prefix="pvscan-zonal") as pool:
                for k, (job, r) in enumerate(zip(jobs, pool.map(task, jobs))):
                    acc.merge(job.tile, r)
                    if progress is not None:
                        progress("zonal", k + 1, total)
        elif prefetch and total > 1:
            with ThreadPoolExecutor(max_workers=1, thread_name_prefix="pvscan-read") as pool:
                nxt = pool.submit(orthos.read, jobs[0].tile, jobs[0].window)
                for k, job in enumerate(jobs):
                    data = nxt.result()
                    if k + 1 < total:
                        nxt = pool.submit(orthos.read, jobs[k + 1].tile, jobs[k + 1].window)
                    r = _measure(data, transform_of(job), fr[job.modules], grid, margins, quantum_k, job.modules)
                    del data
                    acc.merge(job.tile, r)
                    if progress is not None:
                        progress("zonal", k + 1, total)
        else:
            for k, job in enumerate(jobs):
                r = _run_block(orthos.read, job, fr, grid, margins, quantum_k, transform_of(job))
                acc.merge(job.tile, r)
                if progress is not None:
                    progress("zonal", k + 1, total)
    else:
        from pvscan.tasks import run_tasks

        # tasks on local cores or a Dask cluster: each opens the file itself; results merge
        # in any order (the accumulator's choice does not depend on it)
        sched = "threads" if scheduler == "dask" else scheduler
        args = [(orthos.tiles[j.tile], j.window, fr[j.modules], j.modules, grid, margins, quantum_k, orthos.cache_mb)
                for j in jobs]
        for done, (k, r) in enumerate(run_tasks(_block_task, args, sched),
                                      start=1):
            acc.merge(jobs[k].tile, r)
            if progress is not None:
                progress("zonal", done, total)

    return _finish(acc, modules, n, grid, (float(shift[0]), float(shift[1])), quantum_k, cfg)


def _finish(acc: _Accumulator, modules, n, grid, shift, quantum_k, cfg) -> ZonalStats:
    n_along, n_across, nsub = grid
    n_valid = np.maximum(acc.best, 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        vf = np.where(acc.n_fp > 0, n_valid / np.maximum(acc.n_fp, 1), 0.0)
    index = modules.index if hasattr(modules, "index") and not isinstance(modules, np.ndarray) else None
    table = pd.DataFrame(
        {
            "t_mean_c": acc.cols["mean"],
            "t_median_c": acc.cols["median"],
            "t_p95_c": acc.cols["p95"],
            "t_max_c": acc.cols["tmax"],
            "t_min_c": acc.cols["tmin"],
            "t_std_k": acc.cols["std"],
            "valid_fraction": vf,
            "n_pixels": n_valid.astype(np.int64),
            "tile": acc.tile.astype(np.int64),
        },
        index=index,
    )
    n_out = int((acc.tile < 0).sum())
    if n_out:
        log.info("zonal: %d of %d modules outside every ortho tile", n_out, n)
    return ZonalStats(
        table=table,
        cell_median=acc.cell_median.reshape(n, n_along, n_across),
        cell_p95=acc.cell_p95.reshape(n, n_along, n_across),
        cell_count=acc.cell_count.reshape(n, n_along, n_across),
        sub_median=acc.sub_median,
        sub_p95=acc.sub_p95,
        shift=shift,
        quantum_k=quantum_k,
        settings=dict(cfg),
    )
