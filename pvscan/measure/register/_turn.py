"""The turn of the ortho's rows against the layout's, measured from the image alone.

A layout turned against the ortho by a degree or two (a georeferencing error of the layout
or of the ortho) defeats the block correlation on a long site: within one block the rows of
the ortho run across the layout's by a few decimetres, every block's shift is aliased by the
row and module pitches, and the similarity fitted to the blocks carries a wrong rotation.
The direction of the rows does not alias: module rows, tables and the gaps between them are
long straight edges, so the ortho projected onto the axis across them gives a sharp profile
only when the axis is at right angles to them. :func:`measure_rotation` finds the turn (within
``max_rotation_deg``) at which the profiles across the layout's two module axes are sharpest
(the energy of the mean profile, a Radon-transform reading [1]_), whatever the shift.

References
----------
.. [1] J. Radon, "Über die Bestimmung von Funktionen durch ihre Integralwerte längs gewisser
   Mannigfaltigkeiten", Berichte Sächsische Akademie der Wissenschaften 69, 262-277, 1917
   (projections of an image along lines; a straight edge projects to a step only along
   its own direction).
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

__all__ = ["measure_rotation"]

#: Pixels of the overview read at most (a deterministic stride beyond) [-]: the profile of
#: a few hundred thousand pixels is as sharp as that of all of them, at a fraction of the cost.
_MAX_PIXELS = 400_000


def _profile_energy(x: np.ndarray, y: np.ndarray, v: np.ndarray, ang_deg: float, bin_m: float, r: float) -> float:
    """Share of the pixels' variance held by their mean profile across direction ``ang_deg``
    (bins of ``bin_m``) [-]."""
    a = math.radians(ang_deg)
    s = y * math.cos(a) - x * math.sin(a)
    k = np.floor((s + r) / bin_m).astype(np.int64)
    n = np.bincount(k)
    sm = np.bincount(k, v)
    m = n > 0
    return float(np.sum(sm[m] ** 2 / n[m]))


def measure_rotation(orthos: Any, modules: gpd.GeoDataFrame, cfg: Mapping[str, Any]) -> dict[str, Any] | None:
    """The turn [deg, counter-clockwise on the map] that carries the layout's module axes onto
    the ortho's rows and gaps, within ``max_rotation_deg``, or None when the ortho cannot be
    read as a whole or the layout has no module frames.

    Reads the ortho's overview at ``rotation_probe_gsd_m`` at the finest (the
    whole-mosaic decimated read), keeps the pixels within the layout's circumscribed circle
    (plus ``evidence_margin_m``), and scores each turn, in steps of
    ``rotation_probe_step_deg`` and then a tenth of that around the best, by the energy of the
    mean profiles across both module axes (bins of one overview pixel).

    Returns ``{"rotation_deg", "sharpness"}``: the turn and the best score over the median
    score of all turns tried [-] (1: no direction stands out)."""
    read = getattr(orthos, "read_overview", None)
    if read is None or len(modules) == 0 or not {"fux", "fuy"} <= set(modules.columns):
        return None
    fu = modules[["fux", "fuy"]].to_numpy(float)
    ang_u = math.degrees(math.atan2(float(np.nanmedian(fu[:, 1])), float(np.nanmedian(fu[:, 0]))))
    if not math.isfinite(ang_u):
        return None
    b = modules.total_bounds
    span = max(float(getattr(orthos.bounds, "right", b[2]) - getattr(orthos.bounds, "left", b[0])),
               float(getattr(orthos.bounds, "top", b[3]) - getattr(orthos.bounds, "bottom", b[1])))
    max_px = int(max(64, min(2048, math.ceil(span / float(cfg["rotation_probe_gsd_m"])))))
    img, tr = read(max_px)
    h, w = img.shape
    cx, cy = 0.5 * (b[0] + b[2]), 0.5 * (b[1] + b[3])
    r = 0.5 * math.hypot(b[2] - b[0], b[3] - b[1]) + float(cfg["evidence_margin_m"])
    cols = tr.c + (np.arange(w) + 0.5) * tr.a - cx
    rows = tr.f + (np.arange(h) + 0.5) * tr.e - cy
    xx, yy = np.meshgrid(cols, rows)
    ok = np.isfinite(img) & (xx ** 2 + yy ** 2 <= r * r)
    idx = np.flatnonzero(ok.ravel())
    if len(idx) < 1000:
        return None
    if len(idx) > _MAX_PIXELS:
        idx = idx[:: int(math.ceil(len(idx) / _MAX_PIXELS))]
    x, y = xx.ravel()[idx], yy.ravel()[idx]
    v = img.ravel()[idx].astype(float)
    v -= float(np.mean(v))
    total = float(np.sum(v * v))
    if not total > 0:
        return None
    px = abs(float(tr.a))
    lim = float(cfg["max_rotation_deg"])
    step = float(cfg["rotation_probe_step_deg"])

    def score(d: float) -> float:
        return sum(_profile_energy(x, y, v, ang_u + d + q, px, r) for q in (0.0, 90.0)) / total

    coarse = np.arange(-lim, lim + 1e-9, step)
    sc = np.array([score(float(d)) for d in coarse])
    best = float(coarse[int(np.argmax(sc))])
    fine = np.arange(best - step, best + step + 1e-9, step / 10.0)
    sf = np.array([score(float(d)) for d in fine])
    med = float(np.median(sc))
    return {"rotation_deg": round(float(fine[int(np.argmax(sf))]), 4),
            "sharpness": round(float(np.max(sf)) / med, 4) if med > 0 else None}
