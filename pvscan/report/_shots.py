"""The pictures of one anomaly card: a close-up of the module(s) and the surroundings in the
site's colour window (thermal crops), or a plan of the module when no ortho is at hand."""
from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from pvscan.report import _figures as figs
from pvscan.report._geometry import MapGeometry, cell_lines
from pvscan.report._images import Palette, colour_window, module_window, png_data_uri, render_crop
from pvscan.report._raster import ThermalView
from pvscan.report._text import isnum

__all__ = ["card_shots"]


def _boxes(geo: MapGeometry, mods: list, ageom: Any, cfg: dict) -> tuple[tuple, tuple]:
    """(close-up box, context box) around the modules and the region [map m]."""
    b = np.array([g.bounds for g in mods + ([ageom] if ageom is not None and not ageom.is_empty else [])])
    x0, y0, x1, y1 = b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max()
    m0 = mods[0].bounds
    mlen = max(m0[2] - m0[0], m0[3] - m0[1])
    pad = float(cfg["crop_margin"]) * mlen
    close = [x0 - pad, y0 - pad, x1 + pad, y1 + pad]
    w_box, h_box = close[2] - close[0], close[3] - close[1]
    if w_box > 2.5 * h_box:  # a run of modules: keep the close-up from becoming a thin strip
        grow = 0.5 * (w_box / 2.5 - h_box)
        close[1] -= grow
        close[3] += grow
    elif h_box > 2.5 * w_box:
        grow = 0.5 * (h_box / 2.5 - w_box)
        close[0] -= grow
        close[2] += grow
    cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    half = 0.5 * max(float(cfg["context_scale"]) * mlen, 1.6 * max(x1 - x0, y1 - y0) + 2 * pad)
    return tuple(close), (cx - half, cy - half, cx + half, cy + half)


def card_shots(view: ThermalView | None, geo: MapGeometry, r: pd.Series, ageom: Any, palette: Palette,
               cfg: dict, site_window: tuple[float, float], size: int,
               cells: tuple[int, int] | None = None) -> dict[str, Any]:
    """What the card shows above its facts, for the template.

    Returns a dict: ``kind`` ('crops', 'plan' or 'none'), ``size`` [px], ``message`` (kind
    'none') and ``figures``: dicts of ``uri, alt, cls, caption, lo, hi`` (colour window [degC]).
    ``cells`` (cells along, across) draws the cell grid of the module(s) in the close-up (at
    most four modules, so a run of modules stays readable). The close-up's window is levelled
    on the neighbouring modules and reaches the hottest pixel of the affected region, so the
    hot spot's maximum is on the scale.
    """
    from affine import Affine
    from rasterio.features import geometry_mask

    mods = geo.module_geoms(r)
    if not mods:
        return {"kind": "none", "size": size, "message": "thermal crop unavailable (module not in the layout)"}
    close_box, ctx_box = _boxes(geo, mods, ageom, cfg)
    regions = [ageom] if ageom is not None and not ageom.is_empty else []
    neigh = [g for g in geo.near(close_box) if not any(g is m for m in mods)]
    if view is None:  # a plan of the module and the region instead of thermal pixels
        from pvscan.report._images import hex_rgb, render_schematic

        colour = figs.SEVERITY_STYLE.get(str(r["severity"]), figs.SEVERITY_STYLE["monitor"])["color"]
        sev_rgb = hex_rgb(colour)
        ext = (close_box[0], close_box[2], close_box[1], close_box[3])
        png = render_schematic(ext, size, modules=mods, neighbours=neigh, regions=regions, region_rgb=sev_rgb)
        return {"kind": "plan", "size": size, "figures": [{
            "uri": png_data_uri(png), "alt": "plan of the module and the affected region", "cls": "crop plan",
            "caption": "plan: affected region filled (no thermal ortho available)", "lo": None, "hi": None}]}
    close = view.crop(close_box)
    if close is None or not np.isfinite(close[0]).any():
        return {"kind": "none", "size": size, "message": "module outside the thermal ortho"}
    arr, ext = close
    tr = Affine((ext[1] - ext[0]) / arr.shape[1], 0.0, ext[0], 0.0, -(ext[3] - ext[2]) / arr.shape[0], ext[3])
    # the level comes from the neighbouring modules in view (else the module), the top from
    # the anomalous module(s)
    inside = ~geometry_mask(mods, out_shape=arr.shape, transform=tr, all_touched=False)
    around = (~geometry_mask(neigh, out_shape=arr.shape, transform=tr) & ~inside) if neigh else None
    if around is not None and np.isfinite(arr[around]).sum() >= 20:
        level_vals = arr[around]
    else:
        level_vals = arr[inside] if inside.any() else arr
    top_vals = arr[inside] if inside.any() else arr
    lo, hi = module_window(level_vals, top_values=top_vals, percentile_hi=float(cfg["crop_percentile_hi"]),
                           median_level=float(cfg["crop_median_level"]),
                           max_rise=float(cfg["crop_max_rise_k"]), min_span=float(cfg["crop_min_span_k"]))
    spot = (arr[~geometry_mask(regions, out_shape=arr.shape, transform=tr, all_touched=True)] if regions
            else top_vals)
    spot = spot[np.isfinite(spot)]
    if spot.size and float(spot.max()) > hi:  # the scale reaches the hot spot's maximum
        hi = float(spot.max())
    grid = [ln for m in mods[:4] for ln in cell_lines(m, *cells)] if cells else []
    figures = [{"uri": png_data_uri(render_crop(arr, ext, palette, lo, hi, size, modules=mods,
                                                neighbours=neigh + grid, regions=regions)),
                "alt": "close-up thermal crop", "cls": "crop", "caption": "close-up", "lo": lo, "hi": hi}]
    ctx = view.crop(ctx_box)
    if ctx is not None and np.isfinite(ctx[0]).any():
        carr, cext = ctx
        slo, shi = site_window
        if not (isnum(slo) and isnum(shi)):
            slo, shi = colour_window(carr, (1.0, 99.5), float(cfg["crop_min_span_k"]))
        neigh2 = [g for g in geo.near(ctx_box) if not any(g is m for m in mods)]
        png2 = render_crop(carr, cext, palette, slo, shi, size, modules=mods, neighbours=neigh2, regions=regions)
        figures.append({"uri": png_data_uri(png2), "alt": "context, site window thermal crop", "cls": "crop",
                        "caption": "surroundings, site colour scale", "lo": slo, "hi": shi})
    return {"kind": "crops", "size": size, "figures": figures}
