"""The glass a footprint is compared with in the module evidence's off-glass test: the mean
temperature most footprints read, over the whole sample or over each module's neighbourhood
(:func:`pvscan.measure.register.evidence.module_spread`, ``off_glass_k`` / ``off_glass_near``)."""
from __future__ import annotations

import warnings

import numpy as np

__all__ = ["_glass_mode", "_glass_modes", "neighbourhoods"]


def neighbourhoods(frames: np.ndarray, radius_m: float, neighbours: int) -> np.ndarray | None:
    """(k, k) bool: the modules (``frames`` (k, 6): ``fx0, fy0, fux, fuy, fvx, fvy`` as drawn)
    within ``radius_m`` of each one's centre [m], at least its ``neighbours`` nearest (itself
    included); None when every module is a neighbour of every other (one neighbourhood)."""
    fr = np.asarray(frames, float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    d = np.hypot(cx[:, None] - cx[None, :], cy[:, None] - cy[None, :])
    rank = np.argsort(np.argsort(d, axis=1, kind="stable"), axis=1, kind="stable")
    near = (d <= radius_m) | (rank < neighbours)
    return None if near.all() else near


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
    """:func:`_glass_mode` of each module's neighbours: ``near`` (k, k) tells which sampled
    modules are neighbours of which (row i: those of module i) [degC]; NaN means are left
    out. The same numbers as :func:`_glass_mode` on each row's finite means."""
    k = len(means)
    vals = np.where(near & np.isfinite(means)[None, :], means[None, :], np.nan)
    m = np.sort(vals, axis=1)  # NaN last
    n = np.count_nonzero(np.isfinite(m), axis=1)
    # per row: the count of means within 2 * half_width_k above each one (densest window first)
    hi = np.empty((k, k), np.int64)
    for i in range(k):
        hi[i] = np.searchsorted(m[i, :n[i]], m[i] + 2.0 * half_width_k, side="right")
    count = np.where(np.arange(k)[None, :] < n[:, None], hi - np.arange(k)[None, :], -1)
    first = np.argmax(count, axis=1)
    last = hi[np.arange(k), first]
    cols = np.arange(k)[None, :]
    win = np.where((cols >= first[:, None]) & (cols < last[:, None]), m, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        out = np.nanmedian(win, axis=1)
        few = n < 3  # as _glass_mode: the median of fewer than three
        out[few] = np.nanmedian(m[few], axis=1) if few.any() else out[few]
    return out
