"""Statistics of the modules inside one raster window: the kernel of :mod:`pvscan.measure.zonal`.

A pure array function (:func:`measure_window`): labels burnt with
:func:`rasterio.features.rasterize`, pixel centres mapped to module-local ``(u, v)``, and
one sort per grouping (module, cell, substring) on combined integer keys; see the method
in :mod:`pvscan.measure.zonal`.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from affine import Affine
from numpy.typing import ArrayLike
from rasterio.features import rasterize

from pvscan.io.ortho import WARNINGS_LOCK

__all__ = ["measure_window"]

#: Probabilities of the order statistics reported: median and 95th percentile.
_PROBS = (0.5, 0.95)


#: Fraction of a pixel the burnt footprint is grown by, so boundary centres are kept.
_GROW_PX = 0.25


def _frame_corners(fr: np.ndarray, u0: ArrayLike, u1: ArrayLike, v0: ArrayLike,
                   v1: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Map coordinates (n, 4) of the local rectangle [u0,u1] x [v0,v1] of each frame."""
    u = np.stack([u0, u1, u1, u0], axis=-1) if np.ndim(u0) else np.array([u0, u1, u1, u0])
    v = np.stack([v0, v0, v1, v1], axis=-1) if np.ndim(v0) else np.array([v0, v0, v1, v1])
    x = fr[:, 0:1] + u * fr[:, 2:3] + v * fr[:, 4:5]
    y = fr[:, 1:2] + u * fr[:, 3:4] + v * fr[:, 5:6]
    return x, y


def _group_quantiles(skey: np.ndarray, counts: np.ndarray, qbits: int, probs: Sequence[float] = _PROBS,
                     extremes: bool = False) -> list[np.ndarray]:
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


def _measure(data: np.ndarray, transform: Affine, fr: np.ndarray, grid: tuple[int, int, int],
             margins: tuple[float, float], quantum_k: float, index: np.ndarray | None = None) -> _BlockResult:
    n_along, n_across, nsub = grid
    ncell = n_along * n_across
    mu, mv = float(margins[0]), float(margins[1])
    m = len(fr)
    H, W = data.shape
    a, c, e, f = transform.a, transform.c, transform.e, transform.f
    nan = np.full(m, np.nan)

    def empty() -> _BlockResult:
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

    def table(vec: np.ndarray) -> np.ndarray:  # row 0 is a dummy for label 0
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

    def to_c(arr: np.ndarray, lo: int) -> np.ndarray:
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
