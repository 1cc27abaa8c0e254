"""Ground truth of a simulated flight, per module, from the noise-free true temperatures.

Definitions follow the project's output contract:

- ``t_true_median_c``: median true glass temperature inside the footprint (frame excluded),
  noise-free, before the camera (sampled on a regular grid of 4 x 4 points per cell).
- ``reference_true_c``: median ``t_true_median_c`` of the healthy modules of the same table
  row within 6 m (centroid distance; widened to 15 m, then the whole row, when fewer than
  three are found), the module itself excluded.
- ``delta_t_k``: the affected region's temperature minus the reference, the region's
  temperature being its 95th percentile for spot patterns (hot_cell, several_hot_cells,
  junction_box) and its median for area patterns; for healthy modules the module median
  minus the reference.
- ``delta_t_norm_k = delta_t_k * (1000 / G) * (U(v) / U(1))`` with ``U(v) = u0 + u1 * v`` and
  the irradiance ``G`` and wind ``v`` logged when the module was imaged.

``truth.geojson`` also lists, per module, the ``distractors`` touching it (``seam``,
``reflection``, ``cloud_shadow``, ``hot_object``, ``row_shade``), so false alarms can be traced to them.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, TypedDict

import numpy as np
import numpy.typing as npt
from scipy.spatial import cKDTree

from pvscan._typing import BoolArray, FloatArray

if TYPE_CHECKING:
    from pvscan.simulate.geometry import Field
    from pvscan.simulate.scene import Scene

__all__ = ["ModuleTruth", "module_truth"]


class ModuleTruth(TypedDict):
    """Per-module truth arrays (index = module index) of :func:`module_truth`."""

    t_true_median_c: FloatArray    #: [degC]
    t_true_p95_c: FloatArray       #: [degC]
    reference_true_c: FloatArray   #: [degC], NaN without healthy neighbours
    delta_t_k: FloatArray          #: [K]
    delta_t_norm_k: FloatArray     #: [K] at 1000 W/m2 and 1 m/s
    module_delta_t_k: FloatArray   #: [K]
    power_loss_w: FloatArray       #: [W] at STC
    defect: npt.NDArray[np.object_]  #: defect pattern, None when healthy
    region_t_c: FloatArray         #: [degC]


def _grid(n_u: int, n_v: int) -> tuple[FloatArray, FloatArray]:
    uu = (np.arange(n_u) + 0.5) / n_u
    vv = (np.arange(n_v) + 0.5) / n_v
    U, V = np.meshgrid(uu, vv, indexing="ij")
    return U.ravel(), V.ravel()


def _reference(fld: Field, t_med: FloatArray, healthy: BoolArray) -> FloatArray:
    m = fld.modules
    ref = np.full(fld.n_modules, np.nan)
    xy = np.stack([m["cx"], m["cy"]], axis=1)
    for tr in range(fld.n_trows):
        rows = np.flatnonzero(m["trow"] == tr)
        hrows = rows[healthy[rows]]
        if hrows.size == 0:
            continue
        tree = cKDTree(xy[hrows])
        for i in rows:
            for radius in (6.0, 15.0, np.inf):
                if np.isfinite(radius):
                    cand = hrows[tree.query_ball_point(xy[i], radius)]
                else:
                    cand = hrows
                cand = cand[cand != i]
                if cand.size >= 3 or not np.isfinite(radius):
                    break
            if cand.size:
                ref[i] = float(np.median(t_med[cand]))
    return ref


def module_truth(scene: Scene) -> ModuleTruth:
    """Per-module truth arrays of a :class:`~pvscan.simulate.scene.Scene`.

    Returns
    -------
    ModuleTruth
        ``t_true_median_c``, ``t_true_p95_c``, ``reference_true_c``, ``delta_t_k``,
        ``delta_t_norm_k``, ``module_delta_t_k``, ``power_loss_w`` [W at STC], ``defect``
        (object, None when healthy), ``region_t_c``.
    """
    from pvscan.simulate.defects import power_loss_stc

    fld, g = scene.field, scene.geom
    n = fld.n_modules
    pu, pv = _grid(g.n_along * 4, g.n_across * 4)
    glass = ~scene.is_frame(pu, pv)
    pu, pv = pu[glass], pv[glass]
    t_med = np.empty(n)
    t_p95 = np.empty(n)
    chunk = max(1, 400_000 // pu.size)  # bounded memory: ~400k sample points at a time
    for i0 in range(0, n, chunk):
        ids = np.arange(i0, min(n, i0 + chunk))
        idx = np.repeat(ids, pu.size)
        t = scene.module_temperature(idx, np.tile(pu, ids.size), np.tile(pv, ids.size)).reshape(ids.size, -1)
        t_med[ids] = np.median(t, axis=1)
        t_p95[ids] = np.percentile(t, 95, axis=1)

    defect = np.full(n, None, dtype=object)
    healthy = np.ones(n, bool)
    for d in scene.defects:
        defect[d.module] = d.kind
        healthy[d.module] = False
    ref = _reference(fld, t_med, healthy)

    region_t = t_med.copy()
    loss = np.zeros(n)
    for d in scene.defects:
        i = d.module
        u_parts, v_parts = [], []
        for (u0, u1, v0, v1) in d.boxes:
            bu, bv = _grid(24, 24)
            u_parts.append(u0 + bu * (u1 - u0))
            v_parts.append(v0 + bv * (v1 - v0))
        us, vs = np.concatenate(u_parts), np.concatenate(v_parts)
        keep = ~scene.is_frame(us, vs)
        if keep.sum() >= 4:
            us, vs = us[keep], vs[keep]
        t = scene.module_temperature(np.full(us.size, i), us, vs)
        region_t[i] = np.percentile(t, 95) if d.spot else np.median(t)
        loss[i] = power_loss_stc(d, g, float(scene.dt_open[i]), float(scene.u_total[i]),
                                 float(scene.poa_local[i]))

    delta = np.where(healthy, t_med, region_t) - ref
    u_ref = scene.u0 + scene.u1 * 1.0
    norm = delta * (1000.0 / scene.poa) * (scene.u_total / u_ref)
    return {
        "t_true_median_c": t_med, "t_true_p95_c": t_p95, "reference_true_c": ref,
        "delta_t_k": delta, "delta_t_norm_k": norm, "module_delta_t_k": t_med - ref,
        "power_loss_w": loss, "defect": defect, "region_t_c": region_t,
    }
