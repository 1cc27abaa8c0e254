"""Pixels around a table candidate: samples in map coordinates, glass runs, sub-pixel edges,
and the strip of a candidate that shows the frame lines of modules (used by :mod:`.lattice`)."""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from rasterio.windows import Window

from pvscan.measure.layout_image.segment import TableCandidate

__all__: list[str] = []


def _samples(orthos: Any, centre: np.ndarray, half: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixel centres (x, y) [m] and values [degC] (NaN = nodata) of every tile within
    ``half`` [m] of a point (a square window, one windowed read per tile)."""
    xs, ys, ts = [], [], []
    for i, t in enumerate(orthos.tiles):
        inv = ~t.transform
        cols, rows = inv * (np.array([centre[0] - half, centre[0] + half]),
                            np.array([centre[1] - half, centre[1] + half]))
        c0, c1 = int(math.floor(min(cols))), int(math.ceil(max(cols)))
        r0, r1 = int(math.floor(min(rows))), int(math.ceil(max(rows)))
        c0, r0 = max(c0, 0), max(r0, 0)
        c1, r1 = min(c1, t.width), min(r1, t.height)
        if c1 <= c0 or r1 <= r0:
            continue
        data = orthos.read(i, Window(c0, r0, c1 - c0, r1 - r0))
        cc, rr = np.meshgrid(np.arange(c0, c1) + 0.5, np.arange(r0, r1) + 0.5)
        x, y = t.transform * (cc.ravel(), rr.ravel())
        xs.append(np.asarray(x))
        ys.append(np.asarray(y))
        ts.append(data.ravel().astype(np.float64))
    if not xs:
        e = np.empty(0)
        return e, e, e
    return np.concatenate(xs), np.concatenate(ys), np.concatenate(ts)


def _runs_closed(flag: np.ndarray, close_bins: int) -> np.ndarray:
    """A boolean profile with gaps up to ``close_bins`` bins filled."""
    from scipy import ndimage as ndi

    if close_bins < 1:
        return flag
    pad = close_bins + 1
    f = np.pad(flag, pad)
    f = ndi.binary_closing(f, np.ones(2 * close_bins + 1, bool))
    return f[pad:-pad]


def _extent(coord: np.ndarray, glass: np.ndarray, valid: np.ndarray, bin_m: float, close_m: float,
            lo: float, hi: float, probe_m: float) -> tuple[float, float, bool, bool]:
    """Run of glass bins holding 0 along one axis; whether each end meets nodata (a bin
    mostly on nodata within ``probe_m`` [m] beyond it, or the window's end)."""
    edges = np.arange(lo, hi + bin_m, bin_m)
    k = np.clip(np.searchsorted(edges, coord) - 1, 0, len(edges) - 2)
    nb = len(edges) - 1
    n_valid = np.bincount(k, weights=valid, minlength=nb)
    n_all = np.bincount(k, minlength=nb)
    n_glass = np.bincount(k, weights=glass & valid, minlength=nb)
    frac = np.where(n_valid > 0, n_glass / np.maximum(n_valid, 1), np.nan)
    is_glass = np.nan_to_num(frac, nan=0.0) >= 0.5
    # nodata bins next to glass count as unknown, not ground
    nod = (n_all > 0) & (n_valid < 0.5 * n_all)
    is_glass = _runs_closed(is_glass, int(round(close_m / bin_m)))
    mid = int(np.clip(np.searchsorted(edges, 0.0) - 1, 0, nb - 1))
    if not is_glass[mid]:
        near = np.flatnonzero(is_glass)
        if near.size == 0:
            return math.nan, math.nan, False, False
        mid = int(near[np.argmin(np.abs(near - mid))])
    a = mid
    while a > 0 and is_glass[a - 1]:
        a -= 1
    b = mid
    while b < nb - 1 and is_glass[b + 1]:
        b += 1
    probe = max(1, int(round(probe_m / bin_m)))
    cut_lo = a == 0 or bool(nod[max(0, a - probe):a].any())
    cut_hi = b == nb - 1 or bool(nod[b + 1:b + 1 + probe].any())
    return float(edges[a]), float(edges[b + 1]), cut_lo, cut_hi


def _half_crossing(coord: np.ndarray, t: np.ndarray, edge: float, outward: float, gsd: float,
                   min_step_k: float) -> float:
    """Sub-pixel edge: where the mean profile crosses half way between inside and outside.

    ``outward`` is +1 when the outside lies toward larger coordinates. An edge whose inside
    and outside medians differ by less than ``min_step_k`` [K] stays at ``edge``.
    """
    near = np.abs(coord - edge) < 6 * gsd
    if near.sum() < 8:
        return edge
    d = (coord[near] - edge) * outward
    tv = t[near]
    inside = tv[(d < -2 * gsd) & (d > -5 * gsd)]
    outside = tv[(d > 2 * gsd) & (d < 5 * gsd)]
    if inside.size < 3 or outside.size < 3:
        return edge
    ti, to = float(np.median(inside)), float(np.median(outside))
    if abs(ti - to) < min_step_k:
        return edge
    bin_m = gsd / 4
    nb = int(round(8 * gsd / bin_m))
    k = np.floor((d + 4 * gsd) / bin_m).astype(int)
    ok = (k >= 0) & (k < nb)
    sums = np.bincount(k[ok], weights=tv[ok], minlength=nb)
    cnt = np.bincount(k[ok], minlength=nb)
    have = cnt > 0
    if have.sum() < 4:
        return edge
    pos = (np.arange(nb) + 0.5) * bin_m - 4 * gsd
    prof = (sums[have] / cnt[have] - to) / (ti - to)  # 1 inside, 0 outside
    pos = pos[have]
    # last position (from inside outward) where the profile is still above one half
    above = prof >= 0.5
    idx = np.flatnonzero(above[:-1] & ~above[1:])
    if idx.size == 0:
        return edge
    j = int(idx[np.argmin(np.abs(pos[idx]))])
    p0, p1 = prof[j], prof[j + 1]
    x = pos[j] + (p0 - 0.5) / (p0 - p1) * (pos[j + 1] - pos[j])
    return edge + x * outward


def _comb_strip(orthos: Any, cand: TableCandidate, module: Any, layout: Any, settings: dict
                ) -> TableCandidate | None:
    """The strip of a candidate across its axis that shows the frame lines of modules.

    Per row of bins across the axis, the temperature profile along the axis folded on the
    module pitch of either orientation: its dip below the row's median less its peak above
    it [K] (frame lines are narrow cool lines; light through the gaps of a tracker's modules
    onto its shadow makes narrow warm ones; ground carries neither). The run of rows above
    half the largest score is the table. None when the strip is most of the candidate
    (nothing to gain) or narrower than half a foreshortened module side.
    """
    from dataclasses import replace

    gsd = float(orthos.gsd_m)
    reach = float(settings["comb_reach_m"])
    half = 0.5 * math.hypot(cand.length_m, cand.depth_m) + float(settings["window_margin_m"])
    x, y, t = _samples(orthos, cand.centre, half)
    if x.size == 0:
        return None
    axis = cand.axis.astype(float)
    across = np.array([-axis[1], axis[0]])
    s = (x - cand.centre[0]) * axis[0] + (y - cand.centre[1]) * axis[1]
    w = (x - cand.centre[0]) * across[0] + (y - cand.centre[1]) * across[1]
    w_half = 0.5 * cand.depth_m + reach
    sel = np.isfinite(t) & (np.abs(s) < 0.5 * cand.length_m) & (np.abs(w) < w_half)
    if sel.sum() < 64:
        return None
    s, w, t = s[sel], w[sel], t[sel]
    bin_m = gsd
    nb = int(math.ceil(2 * w_half / bin_m))
    k = np.clip(np.floor((w + w_half) / bin_m).astype(int), 0, nb - 1)
    cnt = np.bincount(k, minlength=nb).astype(float)
    amp = np.zeros(nb)
    cos_t = math.cos(math.radians(layout.tilt_deg))
    n_ph = 16
    for mod_s in (module.width_m, module.length_m):
        ph = np.floor(np.mod(s / (mod_s + float(layout.gap_m)), 1.0) * n_ph).astype(int)
        kk = k * n_ph + np.clip(ph, 0, n_ph - 1)
        c2 = np.bincount(kk, minlength=nb * n_ph).reshape(nb, n_ph)
        fold = (np.bincount(kk, weights=t, minlength=nb * n_ph).reshape(nb, n_ph) / np.maximum(c2, 1))
        fold = np.where(c2 > 0, fold, np.nan)
        with np.errstate(invalid="ignore"):
            import warnings

            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                med = np.nanmedian(fold, axis=1)
                # frame lines are narrow cool lines (the dip below the row's median); light
                # through the gaps of a tracker's modules onto its shadow, narrow warm ones
                score = (med - np.nanmin(fold, axis=1)) - (np.nanmax(fold, axis=1) - med)
        amp = np.maximum(amp, np.nan_to_num(score, nan=0.0))
    amp[cnt < 8] = 0.0
    from scipy import ndimage as ndi

    amp = ndi.uniform_filter1d(amp, 3, mode="constant")
    top = int(np.argmax(amp))
    if amp[top] <= 0:
        return None
    on = amp >= 0.5 * amp[top]
    on = _runs_closed(on, max(1, int(round(float(settings["close_m"]) / bin_m))))
    a = b = top
    while a > 0 and on[a - 1]:
        a -= 1
    while b < nb - 1 and on[b + 1]:
        b += 1
    lo, hi = -w_half + a * bin_m, -w_half + (b + 1) * bin_m
    depth = hi - lo
    if depth < min(module.width_m, module.length_m * cos_t) * 0.5 or depth > 0.8 * cand.depth_m:
        return None
    return replace(cand, centre=cand.centre + 0.5 * (lo + hi) * across, depth_m=depth)
