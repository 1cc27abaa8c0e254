"""A table's extent from the periodic frame lines of its modules.

Between two modules of a row lies a gap and two module frames, cooler than the glass in any
contrast with the ground (the frame conducts heat away; common practice: frames show as
cool lines in thermal images of sunlit modules). Along the table's axis these lines repeat
with the module pitch; ground and shadows beside the table have no such comb. So:

1. the samples are binned into a grid in the table's frame ``(w, s)``;
2. the phase of the comb along ``s`` is the one whose lines are coolest against the warmer
   side half a pitch away (the profile averaged over the table's inner rows);
3. per ``w`` row of bins the comb's contrast (glass between the lines minus the lines) is
   measured: glass rows show it, ground and shadow rows do not; the table's rows are the run
   above half the contrast of the centre, its edges at the half-way crossings;
4. along ``s``, the table runs over the lines whose contrast is at least ``dip_fraction`` of
   the median: the first and the last are the table's ends.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["comb_extent"]


def _grid(s: np.ndarray, w: np.ndarray, t: np.ndarray, s_range: tuple[float, float],
          w_range: tuple[float, float], bin_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ns = int(math.ceil((s_range[1] - s_range[0]) / bin_m))
    nw = int(math.ceil((w_range[1] - w_range[0]) / bin_m))
    i = np.floor((w - w_range[0]) / bin_m).astype(int)
    j = np.floor((s - s_range[0]) / bin_m).astype(int)
    ok = (i >= 0) & (i < nw) & (j >= 0) & (j < ns) & np.isfinite(t)
    k = i[ok] * ns + j[ok]
    sums = np.bincount(k, weights=t[ok], minlength=nw * ns)
    cnt = np.bincount(k, minlength=nw * ns)
    grid = np.where(cnt > 0, sums / np.maximum(cnt, 1), np.nan).reshape(nw, ns)
    sc = s_range[0] + (np.arange(ns) + 0.5) * bin_m
    wc = w_range[0] + (np.arange(nw) + 0.5) * bin_m
    return grid, sc, wc


def _fill_cols(grid: np.ndarray) -> np.ndarray:
    """Empty bins (an axis-aligned table leaves every other bin empty) from their neighbours."""
    g = grid.copy()
    for _ in range(3):
        bad = np.isnan(g)
        if not bad.any():
            break
        left = np.roll(g, 1, axis=1)
        right = np.roll(g, -1, axis=1)
        up = np.roll(g, 1, axis=0)
        down = np.roll(g, -1, axis=0)
        est = np.nanmean(np.stack([left, right, up, down]), axis=0)
        g[bad] = est[bad]
    return g


def comb_extent(s: np.ndarray, w: np.ndarray, t: np.ndarray, s_range: tuple[float, float],
                w_range: tuple[float, float], w_inner: tuple[float, float], pitch_s: float, gsd: float,
                dip_fraction: float, close_m: float) -> tuple[float, float, float, float, float] | None:
    """Table extent in its frame from the comb of frame lines along its axis.

    Parameters
    ----------
    s, w : ndarray
        Sample coordinates along and across the table [m].
    t : ndarray
        Sample temperatures [degC] (NaN = nodata).
    s_range, w_range : tuple of float
        Search window [m].
    w_inner : tuple of float
        Rows surely on the table (for the phase) [m].
    pitch_s : float
        Module pitch along the axis, module plus gap [m].
    gsd : float
        Pixel size [m].
    dip_fraction : float
        A line counts when its contrast is at least this fraction of the median [-].
    close_m : float
        Gaps in the rows' comb contrast up to this are row gaps, not the table's edge [m].

    Returns
    -------
    (s_lo, s_hi, w_lo, w_hi, contrast_k) or None
        Edges [m] (the first and last lines along s; the half-way crossings of the comb
        contrast across) and the median line contrast [K]; None without a comb.
    """
    bin_m = gsd / 2
    with np.errstate(invalid="ignore"):
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            grid, sc, wc = _grid(s, w, t, s_range, w_range, bin_m)
            grid = _fill_cols(grid)
            inner = (wc >= w_inner[0]) & (wc <= w_inner[1])
            if inner.sum() < 2:
                return None
            prof = np.nanmedian(grid[inner], axis=0)
            if np.isnan(prof).all():
                return None
            prof = np.where(np.isnan(prof), np.nanmedian(prof), prof)
            period = pitch_s / bin_m
            half = int(round(period / 2))
            ns = prof.size
            # comb response: line at j, glass half a pitch either side
            jj = np.arange(ns)
            lo_j, hi_j = np.clip(jj - half, 0, ns - 1), np.clip(jj + half, 0, ns - 1)
            # against the warmer side: at a table's end the other side is ground
            dip = np.maximum(prof[lo_j], prof[hi_j]) - prof
            n_phase = int(round(period))
            if n_phase < 3:
                return None
            best, phase = -np.inf, 0.0
            for p in range(n_phase):
                idx = np.round(p + np.arange(0, ns, period)).astype(int)
                idx = idx[idx < ns]
                sc_p = float(np.sort(dip[idx])[::-1][: max(2, idx.size // 2)].mean())
                if sc_p > best:
                    best, phase = sc_p, float(p)
            if best <= 0:
                return None
            # sub-bin phase: the centroid of the dip around the best line positions
            k_all = np.arange(-1, int(ns / period) + 2)
            lines = phase + k_all * period
            lines = lines[(lines >= 0) & (lines < ns)]
            li = np.clip(np.round(lines).astype(int), 0, ns - 1)
            d = dip[li]
            med = float(np.median(d[d > 0])) if (d > 0).any() else 0.0
            if med <= 0:
                return None
            on = d >= dip_fraction * med
            # the run of lines holding the window's centre
            centre = int(np.argmin(np.abs(sc[li] - 0.5 * (s_range[0] + s_range[1]))))
            if not on[centre]:
                cand = np.flatnonzero(on)
                if cand.size == 0:
                    return None
                centre = int(cand[np.argmin(np.abs(cand - centre))])
            a = centre
            while a > 0 and on[a - 1]:
                a -= 1
            b = centre
            while b < on.size - 1 and on[b + 1]:
                b += 1
            if b - a < 1:
                return None
            s_lo, s_hi = float(sc[li[a]]), float(sc[li[b]])
            # across: the comb contrast per row of bins, over the lines found
            sel = li[a:b + 1]
            mids = np.clip(np.round(0.5 * (lines[a:b] + lines[a + 1:b + 1])).astype(int), 0, ns - 1)
            if mids.size == 0:
                return None
            row_c = np.nanmedian(grid[:, mids], axis=1) - np.nanmedian(grid[:, sel], axis=1)
            row_c = np.nan_to_num(row_c, nan=0.0)
            ref = float(np.median(row_c[inner])) if inner.any() else 0.0
            if ref <= 0:
                return None
            on_w = row_c >= 0.5 * ref
            # row gaps (a gap and two frames, ~0.1 m) do not end the table
            from scipy import ndimage as ndi

            k_close = max(1, int(round(close_m / bin_m)))
            padded = np.pad(on_w, k_close + 1)
            on_w = ndi.binary_closing(padded, np.ones(2 * k_close + 1, bool))[k_close + 1:-(k_close + 1)]
            ci = int(np.argmin(np.abs(wc - 0.5 * (w_inner[0] + w_inner[1]))))
            if not on_w[ci]:
                return None
            a2 = ci
            while a2 > 0 and on_w[a2 - 1]:
                a2 -= 1
            b2 = ci
            while b2 < on_w.size - 1 and on_w[b2 + 1]:
                b2 += 1

            def cross(i0: int, i1: int) -> float:
                y0, y1 = row_c[i0] - 0.5 * ref, row_c[i1] - 0.5 * ref
                if y0 == y1:
                    return float(0.5 * (wc[i0] + wc[i1]))
                return float(wc[i0] + (wc[i1] - wc[i0]) * y0 / (y0 - y1))

            w_lo = cross(a2, a2 - 1) if a2 > 0 else float(wc[0])
            w_hi = cross(b2, b2 + 1) if b2 < on_w.size - 1 else float(wc[-1])
    return s_lo, s_hi, w_lo, w_hi, med
