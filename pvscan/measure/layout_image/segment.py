"""Glass against ground on a decimated mosaic: table candidates as rotated rectangles.

Glass is told from ground by two things that hold in either contrast (glass warmer than
shaded ground and cooler than sunlit ground in one image): a table carries the regular
texture of its module frames and gaps (gradient energy over about a module width), and
inside a table the glass sits at one level (the mode of the textured region's histogram).
Ground is smooth at the module scale; a shadow's edge is one line, not a texture, and its
level is far from the glass level. Each connected textured region keeps the pixels within
``level_tol_k`` of its own glass level, is closed across frame lines and filled, and its
minimum rotated rectangle (rotating calipers on the convex hull) gives the table's centre,
axes and extent. The rectangles are refined on the full-resolution image by
:mod:`pvscan.measure.layout_image.lattice`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage as ndi

__all__ = ["TableCandidate", "find_tables"]


@dataclass(frozen=True)
class TableCandidate:
    """A table found on the decimated mosaic.

    Attributes
    ----------
    centre : ndarray (2,)
        Map centre (x, y) [m].
    axis : ndarray (2,)
        Unit vector along the table's long side (eastward) [-].
    length_m, depth_m : float
        Extent along and across the axis [m].
    level_c : float
        Glass level (mode of the textured region) [degC].
    band_c : tuple of float
        Temperature band taken for glass (:func:`glass_band`) [degC].
    energy_log_thr : float
        Threshold of log gradient energy [log(K/m)] above which a pixel is textured.
    ground_c : float
        Median of the ground around the table [degC].
    area_px : int
        Glass pixels of the region on the mosaic.
    ground_off_c : float
        Median of the ground around the table that is off the glass level (by more than
        ``level_tol_k``) when it is at least ``ground_off_share`` of the ring [degC]; NaN
        otherwise. A table's shadow at about the glass temperature can fill half the ring and
        take ``ground_c`` to the glass level; the sunlit ground beside it still shows the
        table's contrast.
    """

    centre: np.ndarray
    axis: np.ndarray
    length_m: float
    depth_m: float
    level_c: float
    band_c: tuple[float, float]
    energy_log_thr: float
    ground_c: float
    area_px: int
    ground_off_c: float = math.nan


def _fill_nan(img: np.ndarray) -> np.ndarray:
    """NaN replaced by the nearest valid pixel (so filters do not ring at nodata)."""
    bad = ~np.isfinite(img)
    if not bad.any():
        return img
    if bad.all():
        return np.zeros_like(img)
    idx = ndi.distance_transform_edt(bad, return_distances=False, return_indices=True)
    return img[tuple(idx)]


def _otsu(values: np.ndarray, bins: int = 256) -> float:
    """Otsu's threshold (between-class variance maximum) of a sample."""
    hist, edges = np.histogram(values, bins=bins)
    mids = 0.5 * (edges[1:] + edges[:-1])
    w0 = np.cumsum(hist)
    w1 = w0[-1] - w0
    m0 = np.cumsum(hist * mids)
    mu0 = m0 / np.maximum(w0, 1)
    mu1 = (m0[-1] - m0) / np.maximum(w1, 1)
    between = w0 * w1 * (mu0 - mu1) ** 2
    return float(mids[int(np.argmax(between))])


def _mode(values: np.ndarray, bin_k: float, weights: np.ndarray | None = None) -> float:
    """Mode of a (weighted) sample from a histogram smoothed over three bins [same unit]."""
    lo, hi = float(values.min()), float(values.max())
    if hi - lo < bin_k:
        return float(np.median(values))
    nb = int(math.ceil((hi - lo) / bin_k)) + 1
    hist, edges = np.histogram(values, bins=nb, range=(lo, lo + nb * bin_k), weights=weights)
    hist = ndi.uniform_filter1d(hist.astype(float), 3, mode="constant")
    k = int(np.argmax(hist))
    return float(0.5 * (edges[k] + edges[k + 1]))


def glass_band(values: np.ndarray, level: float, bin_k: float, tol_k: float) -> tuple[float, float]:
    """Temperature band of the glass around its mode [degC].

    From the mode the band widens bin by bin while the smoothed histogram keeps falling (a
    rise of up to 10 % is a bump of the glass) and stays above 2 % of the peak, at most ``tol_k`` each
    way: it stops at the valley toward a neighbouring mode (shaded or sunlit ground a few
    kelvin away) or where the glass runs out; never narrower than a quarter of ``tol_k``.
    """
    lo, hi = level - tol_k - bin_k, level + tol_k + bin_k
    sel = values[(values >= lo) & (values <= hi)]
    if sel.size < 16:
        return level - tol_k, level + tol_k
    nb = int(math.ceil((hi - lo) / bin_k))
    hist, edges = np.histogram(sel, bins=nb, range=(lo, lo + nb * bin_k))
    hist = ndi.uniform_filter1d(hist.astype(float), 5, mode="constant")
    k = int(np.clip(np.searchsorted(edges, level) - 1, 0, nb - 1))
    floor = 0.02 * hist[k]
    a = k
    while a > 0 and hist[a - 1] <= hist[a] * 1.1 and hist[a - 1] > floor:
        a -= 1
    b = k
    while b < nb - 1 and hist[b + 1] <= hist[b] * 1.1 and hist[b + 1] > floor:
        b += 1
    lo_c = min(float(edges[a]), level - 0.25 * tol_k)
    hi_c = max(float(edges[b + 1]), level + 0.25 * tol_k)
    return max(lo_c, level - tol_k), min(hi_c, level + tol_k)


def _min_rect(points: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, float]:
    """Minimum-area rectangle of points (rotating calipers over the hull edges).

    Returns centre (2,), unit long axis (2,), long and short extent.
    """
    from scipy.spatial import ConvexHull

    hull = points[ConvexHull(points).vertices]
    edges = np.diff(np.vstack([hull, hull[:1]]), axis=0)
    ang = np.arctan2(edges[:, 1], edges[:, 0])
    ux, uy = np.cos(ang), np.sin(ang)
    s = hull[:, 0][None, :] * ux[:, None] + hull[:, 1][None, :] * uy[:, None]
    t = -hull[:, 0][None, :] * uy[:, None] + hull[:, 1][None, :] * ux[:, None]
    ds = s.max(1) - s.min(1)
    dt = t.max(1) - t.min(1)
    k = int(np.argmin(ds * dt))
    sc = 0.5 * (s[k].max() + s[k].min())
    tc = 0.5 * (t[k].max() + t[k].min())
    u = np.array([ux[k], uy[k]])
    n = np.array([-uy[k], ux[k]])
    centre = sc * u + tc * n
    if ds[k] >= dt[k]:
        axis, length, depth = u, ds[k], dt[k]
    else:
        axis, length, depth = n, dt[k], ds[k]
    if axis[0] < -1e-9 or (abs(axis[0]) <= 1e-9 and axis[1] < 0):
        axis = -axis
    return centre, axis, float(length), float(depth)


def find_tables(img: np.ndarray, transform: Any, module_width_m: float, settings: dict) -> list[TableCandidate]:
    """Table candidates on a (decimated) mosaic.

    Parameters
    ----------
    img : ndarray (rows, cols)
        Apparent temperature [degC], NaN where there is no data.
    transform : affine.Affine
        North-up pixel-to-map transform of ``img`` [m].
    module_width_m : float
        Short side of a module [m]; sets the texture window and the smallest table.
    settings : mapping
        The ``[layout_detect]`` section: ``texture_window_modules``, ``level_tol_k``,
        ``level_bin_k``, ``min_table_modules``.

    Returns
    -------
    list of TableCandidate
    """
    step = abs(float(transform.a))
    valid = np.isfinite(img)
    work = _fill_nan(img.astype(np.float64))
    gy, gx = np.gradient(work, step)
    grad = np.hypot(gx, gy)
    win = max(3, int(round(settings["texture_window_modules"] * module_width_m / step)))
    energy = ndi.uniform_filter(grad, win)
    # finer texture: high next to frame lines inside a table, low inside a shadow or on ground
    fine = ndi.uniform_filter(grad, max(3, win // 2))
    sample = np.log(energy[valid] + 1e-6)
    if sample.size < 16:
        return []
    thr = _otsu(sample)
    textured = (np.log(energy + 1e-6) > thr) & valid
    labels, n = ndi.label(textured)
    if n == 0:
        return []
    min_px = settings["min_table_modules"] * module_width_m ** 2 / step ** 2
    objs = ndi.find_objects(labels)
    tol = float(settings["level_tol_k"])
    close = np.ones((3, 3), bool)
    # frame lines and module gaps (dips shorter than close_m) are closed, so a table is one
    # region even where relief or blur widens its frame lines to several pixels; the opening
    # then takes off what is thinner than half of that (a shadow's edge at the glass level)
    n_close = max(2, int(math.ceil(0.5 * float(settings["close_m"]) / step)))
    n_open = max(1, n_close // 2)
    out: list[TableCandidate] = []
    pad = win + 2
    for k, sl in enumerate(objs, start=1):
        r0 = max(0, sl[0].start - pad)
        r1 = min(img.shape[0], sl[0].stop + pad)
        c0 = max(0, sl[1].start - pad)
        c1 = min(img.shape[1], sl[1].stop + pad)
        region = labels[r0:r1, c0:c1] == k
        # the energy window spreads the texture half a window beyond the glass
        region = ndi.binary_erosion(region, close, iterations=max(1, win // 2 - 1))
        if region.sum() < min_px:
            continue
        sub = img[r0:r1, c0:c1]
        fine_sub = fine[r0:r1, c0:c1]
        remaining = region & np.isfinite(sub)
        for _ in range(int(settings["level_passes"])):
            vals = sub[remaining]
            if vals.size < min_px:
                break
            # the glass level: the mode of the region's temperatures weighted by fine texture, so
            # a smooth shadow larger than the table does not take the place of the glass
            level = _mode(vals, settings["level_bin_k"], fine_sub[remaining])
            band = glass_band(vals, level, settings["level_bin_k"], tol)
            in_band = remaining & (sub >= band[0]) & (sub <= band[1])
            found = _level_tables(sub, in_band, level, band, (r0, c0), transform, thr, min_px, close, n_close,
                                  n_open, win, tol, settings)
            out.extend(c for c, _ in found)
            # the rest of the region at another level: the part of the plant a cloud shadow or a
            # mosaic seam shows warmer or cooler (one textured region can hold the whole plant),
            # or ground and shadows (their candidates show no comb of frame lines, :mod:`.lattice`)
            taken = np.zeros_like(remaining)
            for _, mask in found:
                taken |= mask
            taken = ndi.binary_dilation(taken, close, iterations=max(1, win // 2))
            remaining &= ~(taken | in_band)
    return out


def _level_tables(sub: np.ndarray, in_band: np.ndarray, level: float, band: tuple[float, float],
                  offset: tuple[int, int], transform: Any, thr: float, min_px: float, close: np.ndarray,
                  n_close: int, n_open: int, win: int, tol: float, settings: dict
                  ) -> list[tuple[TableCandidate, np.ndarray]]:
    """The candidates of one glass level of a textured region, with their pixel masks.

    ``sub`` is the region's window of the mosaic [degC] at row, column ``offset``; ``in_band``
    its pixels within ``band`` [degC] of the level ``level`` [degC]: closed across frame lines,
    filled and opened (``n_close``, ``n_open`` iterations of ``close``), each connected part of
    at least ``min_px`` pixels is a candidate.
    """
    r0, c0 = offset
    glass = ndi.binary_closing(in_band, close, iterations=n_close)
    glass = ndi.binary_fill_holes(glass)
    glass = ndi.binary_opening(glass, close, iterations=n_open)
    sub_lab, m = ndi.label(glass)
    if m == 0:
        return []
    sizes = ndi.sum_labels(glass, sub_lab, index=np.arange(1, m + 1))
    out = []
    for j in np.flatnonzero(sizes >= min_px):
        mask = sub_lab == j + 1
        rr, cc = np.nonzero(mask)
        # pixel corners, so the hull covers whole pixels
        xs = np.concatenate([cc, cc + 1, cc, cc + 1]) + c0
        ys = np.concatenate([rr, rr, rr + 1, rr + 1]) + r0
        x = transform.c + xs * transform.a
        y = transform.f + ys * transform.e
        centre, axis, length, depth = _min_rect(np.stack([x, y], axis=1))
        ring = ndi.binary_dilation(mask, close, iterations=max(2, win // 2)) & ~glass
        gvals = sub[ring & np.isfinite(sub)]
        ground = float(np.median(gvals)) if gvals.size else math.nan
        off = gvals[np.abs(gvals - level) > tol]
        ground_off = float(np.median(off)) if gvals.size and off.size >= float(
            settings["ground_off_share"]) * gvals.size else math.nan
        out.append((TableCandidate(centre=centre, axis=axis, length_m=length, depth_m=depth,
                                   level_c=level, band_c=band, energy_log_thr=thr, ground_c=ground,
                                   area_px=int(sizes[j]), ground_off_c=ground_off), mask))
    return out
