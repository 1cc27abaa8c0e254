"""What a detected layout left out: glass-like area of the mosaic outside the kept tables.

A detection that missed part of the plant (a table the mosaic search did not see, a lattice
fitted and dropped, a table fitted short of its ends) leaves glass in the image that no
module of the layout covers. :func:`uncovered_glass` measures it on the mosaic the tables
were searched on, with the kept tables themselves as the yardstick of what glass looks like
in this flight:

- *at the glass level*: between the ``glass_pct`` low and high percentiles of the pixels
  inside the kept tables (module-to-module spread, seams and hot spots included);
- *textured like a table*: the gradient energy over a module width (the frame lines and
  gaps of a table; :mod:`.segment`) at least the ``texture_pct`` percentile of the energy
  inside the kept tables; smooth ground at the glass level fails it (the middle of a
  module, about half a module width from its frame lines, can too: glass-level pixels that
  such texture encloses count);
- *outside the kept tables* by more than ``reach_modules`` module widths (the blur and the
  energy window spread a table's texture beyond its edge);
- *table-sized*: after closing across frame lines (``close_m``) and an opening of a quarter
  module width (a shadow's edge or a seam is a line, not an area), regions of at least one
  module footprint.

The uncovered area in module footprints against the modules written gives
``uncovered_share`` = uncovered / (written + uncovered) [-], the share of the plant's glass
the layout did not cover; :func:`detected_layout_check` holds it against ``[layout_detect]
max_uncovered_share`` for ``pvscan inspect`` (validity check ``detected_layout``).
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy import ndimage as ndi

__all__ = ["uncovered_glass", "detected_layout_check"]


def uncovered_glass(img: np.ndarray, transform: Any, outlines: Sequence[Any], n_modules: int,
                    module_width_m: float, module_area_m2: float, settings: Mapping[str, Any]) -> dict:
    """Glass-like area of the mosaic that no kept table covers (see the module docstring).

    Parameters
    ----------
    img : ndarray (rows, cols)
        The mosaic [degC], NaN where there is no data.
    transform : affine.Affine
        Its north-up pixel-to-map transform [m].
    outlines : sequence of shapely Polygon
        The kept tables' outlines (map CRS).
    n_modules : int
        Modules written by the detection.
    module_width_m, module_area_m2 : float
        Short side [m] and footprint seen from above [m2] of one module.
    settings : mapping
        The ``[layout_detect]`` section: ``texture_window_modules``, ``close_m``,
        ``uncovered_glass_pct``, ``uncovered_texture_pct``, ``uncovered_reach_modules``.

    Returns
    -------
    dict
        ``uncovered_m2`` [m2], ``uncovered_modules`` (module footprints) and
        ``uncovered_share`` [-]; None values when there is nothing to measure against (no
        kept table on the mosaic).
    """
    from rasterio.features import rasterize

    from pvscan.measure.layout_image.segment import _fill_nan

    none = {"uncovered_m2": None, "uncovered_modules": None, "uncovered_share": None}
    step = abs(float(transform.a))
    valid = np.isfinite(img)
    if not outlines or not valid.any():
        return none
    inside = rasterize([(g, 1) for g in outlines], out_shape=img.shape, transform=transform,
                       fill=0, dtype="uint8").astype(bool)
    inside_ok = inside & valid
    if inside_ok.sum() < 16:
        return none
    work = _fill_nan(img.astype(np.float64))
    gy, gx = np.gradient(work, step)
    win = max(3, int(round(float(settings["texture_window_modules"]) * module_width_m / step)))
    log_e = np.log(ndi.uniform_filter(np.hypot(gx, gy), win) + 1e-6)
    lo_pct, hi_pct = (float(p) for p in settings["uncovered_glass_pct"])
    t_lo, t_hi = np.percentile(img[inside_ok], [lo_pct, hi_pct])
    e_thr = float(np.percentile(log_e[inside_ok], float(settings["uncovered_texture_pct"])))
    reach_px = max(1, int(math.ceil(float(settings["uncovered_reach_modules"]) * module_width_m / step)))
    near = ndi.binary_dilation(inside, np.ones((3, 3), bool), iterations=reach_px)
    level = valid & ~near & (img >= t_lo) & (img <= t_hi)
    like = level & (log_e >= e_thr)
    sq = np.ones((3, 3), bool)
    n_close = max(1, int(math.ceil(0.5 * float(settings["close_m"]) / step)))
    like = ndi.binary_closing(like, sq, iterations=n_close) & ~near
    # the middle of a module lies about half a module width from its frame lines, where a
    # window of one module width can miss them: glass-level pixels that textured glass
    # encloses are glass too
    like |= ndi.binary_fill_holes(like) & level
    like = ndi.binary_opening(like, sq, iterations=max(1, int(round(0.3 * module_width_m / step))))
    lab, n = ndi.label(like)
    area_px = 0
    if n:
        sizes = ndi.sum_labels(like, lab, index=np.arange(1, n + 1))
        area_px = int(sizes[sizes * step ** 2 >= module_area_m2].sum())
    area = area_px * step ** 2
    modules = area / module_area_m2
    share = modules / (n_modules + modules) if n_modules + modules > 0 else 0.0
    return {"uncovered_m2": round(area, 2), "uncovered_modules": round(modules, 1), "uncovered_share": round(share, 4)}


def detected_layout_check(modules: Any, settings: Mapping[str, Any] | None = None) -> dict:
    """Validity check ``detected_layout``: the share of the plant's glass the layout detected in
    the ortho left uncovered (``uncovered_share`` of ``modules.attrs["layout"]["detected"]``,
    :func:`uncovered_glass`) is at most ``[layout_detect] max_uncovered_share`` [-].

    A detected layout that missed part of the plant gives a result for part of it: the modules
    it left out are neither healthy nor anomalous. Unknown (``passed`` None) for a drawn layout
    or when nothing was measured.
    """
    from pvscan.io.settings import section
    from pvscan.measure.checks import make_check

    lim = float(section(settings, "layout_detect")["max_uncovered_share"])
    src = "[layout_detect] max_uncovered_share (calibrated on simulated flights)"
    info = dict(getattr(modules, "attrs", {}).get("layout") or {})
    if info.get("source") != "detected":
        return make_check("detected_layout", None, lim, "max", "", src,
                          message="detected layout: not run (the layout was given)")
    det = dict(info.get("detected") or {})
    share = det.get("uncovered_share")
    if share is None:
        return make_check("detected_layout", None, lim, "max", "", src,
                          message="detected layout: unknown (no uncovered glass measured)")
    share = float(share)
    ok = share <= lim
    msg = (f"detected layout: {100 * share:.1f} % of the plant's glass ({det.get('uncovered_modules')} module "
           f"footprints) lies outside the {det.get('modules')} modules found, at most {100 * lim:g} %"
           + ("" if ok else " (failed: part of the plant is missing from the result; draw the layout, or check "
                            "the detected one with `pvscan layout detect`)"))
    c = make_check("detected_layout", share, lim, "max", "", src, message=msg)
    c.update({"uncovered_modules": det.get("uncovered_modules"), "dropped_share": det.get("dropped_share")})
    return c
