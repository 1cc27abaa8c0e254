"""Hot cells: ``hot_cell`` and ``several_hot_cells``.

A cell in reverse bias (a crack, local shading, mismatch) dissipates power and heats as a
whole, so its median rises with its 95th percentile; it stands out of its own substring and
of the cells around it.

References
----------
.. [1] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from scipy import ndimage

from pvscan.diagnose.features import CHUNK_MODULES, Features, Hits, cell_neighbour_median, confidence, quality
from pvscan.diagnose.patterns.junction_box import box_cells

__all__ = ["pattern_hot_cell"]


def _box_filter_median(X: np.ndarray) -> np.ndarray:
    """Median of each cell's (up to 8) neighbours within the module, NaN-aware."""
    return cell_neighbour_median(X)



def _hot_cells(R: np.ndarray, R95: np.ndarray, base_sub: np.ndarray, col_sub: np.ndarray, ok: np.ndarray,
               box: np.ndarray, thr: float, cfg: Mapping) -> tuple[np.ndarray, np.ndarray]:
    """The hot cells (m, A, C) of a chunk of modules and each module's largest hot-cell p95 residual."""
    m, A, C = R.shape
    base = base_sub[:, col_sub][:, None, :]
    X = R - base
    X95 = R95 - base
    loc = X - _box_filter_median(X)
    with np.errstate(invalid="ignore"):
        cand = ((X >= thr) & (X95 >= thr) & (X >= float(cfg["hot_cell_whole_min"]) * X95)
                & (loc >= float(cfg["hot_cell_contrast_min"]) * X))
    Xc = np.where(cand, X, -np.inf)
    peak = ndimage.maximum_filter(Xc, size=(1, 3, 3), mode="constant", cval=-np.inf)
    hot = cand & (X >= float(cfg["hot_cell_peak_share"]) * peak)
    # a hot cell at a short edge cut away by the edge margin (no pixels) shows only as heat
    # bleeding into the p95 of the cell inside it: a spot there, away from any junction box
    nan_c = ~np.isfinite(R)
    beyond = np.zeros_like(nan_c)
    beyond[:, 1, :] = nan_c[:, 0, :]
    beyond[:, A - 2, :] |= nan_c[:, A - 1, :]
    loc95 = X95 - _box_filter_median(X95)
    with np.errstate(invalid="ignore"):
        edge_spot = (beyond & (X95 >= thr) & (loc95 >= float(cfg["hot_cell_contrast_min"]) * X95)
                     & ~box[None] & ~cand)
    Xe = np.where(edge_spot, X95, -np.inf)
    peak_e = ndimage.maximum_filter(np.maximum(Xe, np.where(hot, X95, -np.inf)), size=(1, 3, 3),
                                    mode="constant", cval=-np.inf)
    hot |= edge_spot & (X95 >= peak_e)
    hot &= ok[:, None, None]
    xmax = np.where(hot, X95, -np.inf).reshape(m, -1).max(axis=1) if m else np.zeros(0)
    return hot, xmax


def pattern_hot_cell(F: Features, cfg: Mapping) -> tuple[Hits, Hits]:
    """Single cells markedly warmer than their substring and their neighbouring cells.

    A hot cell (a cell in reverse bias: crack, shading, mismatch) heats the whole cell, so
    its median rises with its p95 (a junction-box spot raises the p95 only). It must stand
    out from its own substring (so a hot cell inside a bypassed substring is still seen)
    and from its neighbouring cells (so a smooth reflection is not a hot cell). A cell next
    to a hot one counts only when at least ``hot_cell_peak_share`` of the hottest around
    it (heat spreading into neighbours does not). With ``hot_cell_merge_touching``,
    touching hot cells form one hot spot (robust to footprints a few centimetres off, at
    the price of calling two touching hot cells one), up to ``hot_cell_merge_max_cells``
    cells; a larger cluster counts as several hot cells.

    Returns
    -------
    (Hits, Hits)
        ``hot_cell`` (one cell) and ``several_hot_cells`` (several); region temperature =
        the hottest hot cell's p95.
    """
    thr = max(float(cfg["hot_cell_min_k"]), float(cfg["noise_z"]) * F.sig_cell)
    n, A, C = F.n, F.n_along, F.n_across
    box = box_cells(F)
    hot = np.zeros((n, A, C), bool)
    xmax = np.full(n, -np.inf)
    # modules in chunks (every test below is within one module): bounded temporaries
    for s in range(0, n, CHUNK_MODULES):
        sl = slice(s, min(s + CHUNK_MODULES, n))
        hot[sl], xmax[sl] = _hot_cells(F.R[sl], F.R95[sl], F.base_sub[sl], F.col_sub, F.ok[sl], box, thr, cfg)
    if bool(cfg["hot_cell_merge_touching"]):
        # touching hot cells as one hot spot: a spot straddling a cell boundary (footprints
        # a few centimetres off) then does not pose as several hot cells
        struct = np.zeros((3, 3, 3), bool)
        struct[1] = True
        labels, _ = ndimage.label(hot, structure=struct)
        count = np.zeros(F.n, np.int64)
        if labels.max() > 0:
            owner = np.array([sl[0].start for sl in ndimage.find_objects(labels)], dtype=np.int64)
            # a spot a few centimetres off the cell grid raises the median of at most two
            # cells (a cell's median needs more than half of it hot): a larger cluster of
            # whole hot cells is several hot cells
            size = np.bincount(labels.ravel())[1:]
            np.add.at(count, owner, np.where(size > int(cfg["hot_cell_merge_max_cells"]), 2, 1))
    else:
        count = hot.sum(axis=(1, 2))
    temp = np.where(hot, F.cp, -np.inf).reshape(n, -1).max(axis=1) if n else np.zeros(0)
    temp = np.where(count > 0, temp, np.nan)
    conf = confidence(quality(xmax, thr))
    single = Hits("hot_cell", count == 1, conf, temp)
    multi = Hits("several_hot_cells", count >= 2, conf, temp)
    for i in np.flatnonzero(count).tolist():
        cells = np.argwhere(hot[i])
        target = single if count[i] == 1 else multi
        target.region[i] = "cell" if len(cells) == 1 else "cells"
        target.boxes[i] = [(a / A, (a + 1) / A, c / C, (c + 1) / C) for a, c in cells]
    F.extra["hot_cells"] = hot
    return single, multi
