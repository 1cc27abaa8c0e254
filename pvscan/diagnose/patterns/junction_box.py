"""A hot junction box: ``junction_box``.

The spot sits where the box is: the centre of a short edge (full-cell modules with one
box), or on the module's middle line across its width, one per substring (half-cut modules
with split boxes). It raises the 95th percentile of the cells meeting there more than their
median.

References
----------
.. [1] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

import warnings
from collections.abc import Mapping

import numpy as np

from pvscan.diagnose.features import Features, Hits, confidence, quality
from pvscan.robust import nanmax, nanmedian

__all__ = ["pattern_junction_box", "box_cells"]


def _box_centres(F: Features) -> list[tuple[float, float]]:
    if F.split_box:
        return [(0.5, (k + 0.5) / F.nsub) for k in range(F.nsub)]
    return [(0.0, 0.5), (1.0, 0.5)]


def _box_block(F: Features, u0: float, v0: float) -> tuple[np.ndarray, np.ndarray]:
    """Cell rows and columns meeting at a junction box centre (u0, v0).

    At a short edge the two outermost rows are taken: the outermost may have lost its
    pixels to the edge margin.
    """
    A, C = F.n_along, F.n_across
    uc = (np.arange(A) + 0.5) / A
    vc = (np.arange(C) + 0.5) / C
    if u0 <= 0.0:
        ii = np.arange(min(2, A))
    elif u0 >= 1.0:
        ii = np.arange(max(A - 2, 0), A)
    else:
        ii = np.flatnonzero(np.abs(uc - u0) <= 1.0 / A + 1e-9)
    jj = np.flatnonzero(np.abs(vc - v0) <= 1.0 / C + 1e-9)
    return ii, jj


def box_cells(F: Features) -> np.ndarray:
    """(A, C) mask of the cells at any junction box position."""
    mask = np.zeros((F.n_along, F.n_across), bool)
    for (u0, v0) in _box_centres(F):
        ii, jj = _box_block(F, u0, v0)
        mask[np.ix_(ii, jj)] = True
    return mask


def pattern_junction_box(F: Features, cfg: Mapping) -> Hits:
    """A small hot spot where a junction box sits.

    Full-cell modules with one edge box: the centre of a short edge (``u`` near 0 or 1,
    ``v`` = 0.5); half-cut modules with split boxes: the middle line ``u`` = 0.5, at the
    centre of each substring. The spot straddles the cells meeting at that point, raising
    their p95 more than their median (a hot cell raises its whole cell), and no cell around
    them is hotter (heat bleeding from a hot cell next to the box raises the p95 too).

    Returns
    -------
    Hits
        Region ``spot``; region temperature = the highest p95 of the spot's cells.
    """
    A, C, n = F.n_along, F.n_across, F.n
    X = F.R - F.base[:, None, None]
    X95 = F.R95 - F.base[:, None, None]
    thr = max(float(cfg["junction_box_min_k"]), float(cfg["noise_z"]) * F.sig_cell)
    best = np.full(n, -np.inf)
    best_t = np.full(n, np.nan)
    best_box: list[tuple[float, float, float, float] | None] = [None] * n
    best_q = np.zeros(n)
    for (u0, v0) in _box_centres(F):
        ii, jj = _box_block(F, u0, v0)
        sub95 = X95[:, ii][:, :, jj].reshape(n, -1)
        subm = X[:, ii][:, :, jj].reshape(n, -1)
        subt = F.cp[:, ii][:, :, jj].reshape(n, -1)
        if sub95.shape[1] == 0:
            continue
        s = np.where(np.isfinite(sub95), sub95, -np.inf)
        order = np.argsort(-s, axis=1)
        top = np.take_along_axis(s, order[:, :1], axis=1)[:, 0]
        second = np.take_along_axis(s, order[:, 1:2], axis=1)[:, 0] if s.shape[1] > 1 else np.full(n, -np.inf)
        med_top = np.take_along_axis(subm, order[:, :1], axis=1)[:, 0]
        # the rest of the same cell rows: a spot stands out of a quiet line, a band along the
        # edge not. Each row on its own (the least quiet row counts) and its cells' departures
        # either way (the median absolute residual), so a line the ground or the frame fills in
        # part, warm and cold cells side by side where a mosaic seam shifted the module, is not
        # diluted by the line inside it. And the rest of the box's cell columns, away from the
        # rows around the box, each column on its own: a spot is local, a band along a column (a
        # shadow's edge) is not
        others = np.setdiff1d(np.arange(C), jj)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            if others.size:
                rest = np.nanmax(np.stack([nanmedian(np.abs(X95[:, r, others]), axis=1) for r in ii], axis=1),
                                 axis=1)
            else:
                rest = np.zeros(n)
            far = np.setdiff1d(np.arange(A), np.arange(max(ii.min() - 1, 0), min(ii.max() + 2, A)))
            if far.size:
                col_rest = np.nanmax(np.stack([nanmedian(X95[:, far, c], axis=1) for c in jj], axis=1), axis=1)
                rest = np.fmax(rest, col_rest)
        rest = np.nan_to_num(rest, nan=0.0)
        # the cells around the box: none hotter than the box (else it is heat bleeding
        # from a hot cell next to it)
        ri = np.arange(max(ii.min() - 1, 0), min(ii.max() + 2, A))
        rj = np.arange(max(jj.min() - 1, 0), min(jj.max() + 2, C))
        ring = np.ones((ri.size, rj.size), bool)
        ring[np.ix_(np.isin(ri, ii), np.isin(rj, jj))] = False
        around = X95[:, ri][:, :, rj][:, ring] if ring.any() else np.full((n, 1), -np.inf)
        around = np.where(np.isfinite(around), around, -np.inf).max(axis=1)
        with np.errstate(invalid="ignore"):
            spot = med_top <= float(cfg["junction_box_spot_max"]) * top
            # a box cell cut away by the edge margin (no pixels) cannot be checked
            n_valid = np.isfinite(sub95).sum(axis=1)
            straddle = (second >= float(cfg["junction_box_straddle_min"]) * top) | (n_valid < 2)
            alone = ((top - rest) >= 0.5 * top) & (around < top)
        ok = (top >= thr) & spot & straddle & alone
        better = ok & (top > best)
        best = np.where(better, top, best)
        best_t = np.where(better, nanmax(subt, axis=1), best_t)
        best_q = np.where(better, quality(top, thr), best_q)
        hu, hv = 0.5 / A, 0.5 / C
        for i in np.flatnonzero(better).tolist():
            best_box[i] = (max(0.0, u0 - hu), min(1.0, u0 + hu), max(0.0, v0 - hv), min(1.0, v0 + hv))
    hit = F.ok & np.isfinite(best) & (best > -np.inf)
    h = Hits("junction_box", hit, confidence(best_q), best_t)
    for i in np.flatnonzero(hit).tolist():
        h.region[i] = "spot"
        box = best_box[i]  # set wherever best is finite, so wherever hit
        h.boxes[i] = [box] if box is not None else []
    return h
