"""Dirt collecting along the lower edge: ``soiling``.

Water runs off a tilted module over its lower edge and leaves dirt there; the dirty band
absorbs and does not convert, so it runs warmer, all along the edge, while the rest of the
module does not.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from pvscan.diagnose.features import Features, Hits, confidence, quality
from pvscan.robust import iqr, nanmax, nanmedian

__all__ = ["pattern_soiling"]


def _edge_profile(F: Features, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Median of ``X`` over each line of cells parallel to the lower edge, from the edge up.

    Returns
    -------
    profile : ndarray (n, L)
        Line medians, line 0 at the lower edge (NaN-padded to the longer side).
    length : ndarray of int (n,)
        Lines per module (n_along when the lower edge is u = 0, else n_across).
    """
    n, A, C = F.n, F.n_along, F.n_across
    L = max(A, C)
    prof = np.full((n, L), np.nan)
    lu = F.lower_u
    ok = np.isfinite(X)
    # a line with fewer than half its cells imaged (edge margin) says nothing
    prof[lu, :A] = np.where(ok[lu].mean(axis=2) >= 0.5, nanmedian(X[lu], axis=2), np.nan)
    prof[~lu, :C] = np.where(ok[~lu].mean(axis=1) >= 0.5, nanmedian(X[~lu], axis=1), np.nan)
    return prof, np.where(lu, A, C)


def pattern_soiling(F: Features, cfg: Mapping) -> Hits:
    """A warm band along the module's lower edge (dirt collecting where water runs off).

    The lower edge is ``u = 0`` when ``lower_edge == "u"`` and ``v = 0`` when ``"v"``.
    Lines of cells parallel to the lower edge are raised from the edge up to the band's
    depth (at most a third of the module), all along the edge, while the rest of the
    module and its upper edge are not, nor the modules beside it along the edge. The cells'
    p95 is used, since a thin band covers only part of the cells at the edge.

    Returns
    -------
    Hits
        Region ``band``; region temperature = the median over the band's cells of their p95.
    """
    n, A, C = F.n, F.n_along, F.n_across
    X95 = F.R95 - F.base[:, None, None]
    prof, length = _edge_profile(F, X95)
    L = prof.shape[1]
    band = nanmax(prof[:, :2], axis=1)
    # least band rise: given at the reference conditions and scaled to each module's like
    # any rise (the dirt's heat grows with G / U(v)), never below the camera's noise floor
    thr = np.maximum(float(cfg["soiling_min_norm_k"]) * F.rise / F.extra.get("rise_ref", F.rise),
                     float(cfg["noise_z"]) * F.sig_cell)
    with np.errstate(invalid="ignore"):
        up = prof >= 0.5 * band[:, None]
        # a missing line at the very edge (all cells too thin) does not end the band
        up[:, 0] |= ~np.isfinite(prof[:, 0])
    depth = np.argmin(np.concatenate([up, np.zeros((n, 1), bool)], axis=1), axis=1)
    maxd = np.ceil(length / 3.0).astype(int)
    lines = np.arange(L)[None, :]
    # the line just above the band is its fringe; the rest of the module must stay cool
    rest = np.where((lines >= depth[:, None] + 1) & (lines < length[:, None]), prof, np.nan)
    rest_max = nanmax(rest, axis=1)
    top = prof[np.arange(n), np.maximum(length - 1, 0)]
    # coverage along the edge: band cells raised by half the band, among valid cells
    ii, jj = np.indices((A, C))
    line_of = np.where(F.lower_u[:, None, None], ii[None], jj[None])          # (n, A, C)
    in_band = line_of < depth[:, None, None]
    valid = np.isfinite(X95)
    edge_len = np.where(F.lower_u, C, A)
    n_band = (in_band & valid).sum(axis=(1, 2))
    # flat along the edge: a band, not a few hot cells
    spread = iqr(np.where(in_band, X95, np.nan).reshape(n, -1), axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        raised = (X95 >= 0.5 * band[:, None, None]) & in_band & valid
        cover = raised.sum(axis=(1, 2)) / np.maximum(n_band, 1)
        hit = (F.ok & (band >= thr) & (depth >= 1) & (depth <= maxd) & (cover >= float(cfg["soiling_cover_min"]))
               & (n_band >= 0.5 * edge_len) & (spread <= 0.6 * band)
               & (np.nan_to_num(rest_max, nan=0.0) <= float(cfg["soiling_top_max"]) * band)
               & (np.nan_to_num(top, nan=0.0) <= float(cfg["soiling_top_max"]) * band))
    # a band of one module: the modules beside it along the lower edge have none as warm
    # (a mosaic seam's corner or warm ground along the row would)
    adj = F.extra.get("adjacent")
    if adj is not None and hit.any():
        side = np.where(F.lower_u[:, None], adj[:, 2:4], adj[:, 0:2])
        nb_band = np.where(side >= 0, np.nan_to_num(band, nan=0.0)[np.maximum(side, 0)], 0.0)
        with np.errstate(invalid="ignore"):
            hit &= ~(nb_band >= 0.5 * band[:, None]).any(axis=1)
    temp = nanmedian(np.where(in_band, F.cp, np.nan).reshape(n, -1), axis=1)
    h = Hits("soiling", hit, confidence(quality(band, thr), np.clip(cover, 0, 1)), temp)
    for i in np.flatnonzero(hit).tolist():
        h.region[i] = "band"
        h.boxes[i] = [(0.0, depth[i] / A, 0.0, 1.0)] if F.lower_u[i] else [(0.0, 1.0, 0.0, depth[i] / C)]
    return h
