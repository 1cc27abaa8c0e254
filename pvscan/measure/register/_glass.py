"""The glass a footprint is compared with in the module evidence's off-glass test: the mean
temperature most footprints read, over the whole sample or over each module's neighbourhood
(:func:`pvscan.measure.register.evidence.module_spread`, ``off_glass_k`` / ``off_glass_near``)."""
from __future__ import annotations

import numpy as np

__all__ = ["_glass_mode", "_glass_modes", "neighbourhoods"]


def neighbourhoods(frames: np.ndarray, radius_m: float, neighbours: int) -> np.ndarray | None:
    """(k, K) int: per module (``frames`` (k, 6): ``fx0, fy0, fux, fuy, fvx, fvy`` as drawn) the
    positions of the modules within ``radius_m`` of its centre [m], at least its ``neighbours``
    nearest (itself included), padded with -1; None when every module is a neighbour of every
    other (one neighbourhood)."""
    fr = np.asarray(frames, float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    d = np.hypot(cx[:, None] - cx[None, :], cy[:, None] - cy[None, :])
    rank = np.argsort(np.argsort(d, axis=1, kind="stable"), axis=1, kind="stable")
    near = (d <= radius_m) | (rank < neighbours)
    if near.all():
        return None
    count = near.sum(axis=1)
    out = np.full((len(fr), int(count.max())), -1, np.int64)
    rows, cols = np.nonzero(near)
    out[rows, np.arange(len(rows)) - np.repeat(np.cumsum(count) - count, count)] = cols
    return out


def _glass_mode(means: np.ndarray, half_width_k: float) -> float:
    """Centre of the window of +-``half_width_k`` holding the most footprint means [degC].

    The glass of most footprints is the reference: with a placement one module pitch across
    two-row tables half of the footprints read ground, and their median would lie between
    ground and glass; the densest window picks one population (ties: the median of it)."""
    m = np.sort(np.asarray(means, float))
    if len(m) < 3:
        return float(np.median(m))
    hi = np.searchsorted(m, m + 2.0 * half_width_k, side="right")
    count = hi - np.arange(len(m))
    i = int(np.argmax(count))
    return float(np.median(m[i:hi[i]]))


def _glass_modes(means: np.ndarray, near: np.ndarray, half_width_k: float) -> np.ndarray:
    """:func:`_glass_mode` of each module's neighbours: row i of ``near`` (k, K) holds the
    positions of module i's neighbours, padded with -1 (:func:`neighbourhoods`) [degC]; NaN
    means are left out. The same numbers as :func:`_glass_mode` on each row's finite means."""
    idx = np.asarray(near)
    vals = np.where(idx >= 0, np.asarray(means, float)[np.maximum(idx, 0)], np.nan)
    m = np.sort(vals, axis=1)  # NaN last
    kk = m.shape[1]
    n = np.count_nonzero(np.isfinite(m), axis=1)
    # per row and mean: how many means lie at most 2 * half_width_k above it (sorted: from it on)
    hi = np.count_nonzero(m[:, None, :] <= (m + 2.0 * half_width_k)[:, :, None], axis=2)
    j = np.arange(kk)[None, :]
    count = np.where(j < n[:, None], hi - j, -1)
    first = np.argmax(count, axis=1)
    last = hi[np.arange(len(m)), first]
    # the median of the window (sorted, contiguous), and of all the means where fewer than three
    # (as _glass_mode): the middle one, or the mean of the middle two
    lo = np.where(n < 3, 0, first)
    size = np.where(n < 3, n, last - first)
    r = np.arange(len(m))
    a = m[r, np.clip(lo + (size - 1) // 2, 0, kk - 1)]
    b = m[r, np.clip(lo + size // 2, 0, kk - 1)]
    out = np.where(size > 0, (a + b) / 2.0, np.nan)
    return out
