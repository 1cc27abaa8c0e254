"""Co-registration of the module layout to the thermal orthomosaic.

Drone orthomosaics are routinely off by tens of centimetres to a few metres against the
layout drawing; half a module's width of offset is enough to read ground or gap pixels
as module pixels. This module measures the offset from the image itself and translates
the footprints used for measuring.

Method
------
The ortho is cut into blocks (``block_m`` on a side, per tile). In each block

1. the image is read through windowed reads, reduced to a working grid of about
   ``work_gsd_m`` and clipped to its central percentiles (so that hot spots do not
   dominate);
2. the layout footprints are rasterised on the same grid with sub-pixel coverage
   (``supersample`` x ``supersample`` samples per pixel);
3. both are turned into the feature that is compared: by default (``feature =
   "gradient"``) the Gaussian gradient magnitude, i.e. the strength of the edges whatever
   their polarity, because the glass may be warmer than shaded ground on one side of a
   table and cooler than sunlit ground on the other; or (``"intensity"``) the values
   themselves, with one contrast sign for the flight decided by a vote of the blocks;
4. both are tapered and phase-correlated: the cross-power spectrum, high-passed
   (``highpass_sigma_m``) and partially whitened (``whitening``: 0 = plain
   cross-correlation, 1 = pure phase correlation), is transformed back and searched for
   its best peak within ``max_shift_m``; a stronger peak in a guard ring up to
   ``guard_factor`` times farther flags the block (the offset may exceed the radius);
5. the candidate peaks are refined by the matrix-multiply upsampled DFT of
   Guizar-Sicairos et al. (2008) to ``1 / upsample`` pixel.

Rows of tables are periodic: a shift by one row pitch (or one module pitch) scores
almost as well as the true shift. Each block therefore keeps every candidate peak
within ``ambiguity_ratio`` of its best one. The true peak is the best only thanks to
aperiodic structure (table ends, block and array edges); blocks whose best peak is
not distinct from the next one get a low confidence, and every block finally takes
the candidate nearest to the consensus of the confident blocks. A block rejected as an
outlier whose runner-up peak agrees with the fit is re-admitted with that peak.

The block shifts are combined by an iteratively reweighted least-squares fit of a
similarity transform (translation, rotation, scale) with outlier rejection; its
rotation and scale are reported, and when ``follow_drift`` is set each module is
translated by the fitted shift at its own centre, so a drift across a large site is
followed.

A row's shadow on the ground can be as wide as the row and more uniform than the glass
(single-axis trackers in the morning or evening): the footprint mask then fits the
shadow strip better than the row itself, and no edge or texture statistic tells the two
apart. Physics does: when the caller gives the apparent temperature sunlit glass should
show at the flight's conditions (:func:`expected_module_apparent_c`: Faiman model, then
the radiometric chain of :mod:`pvscan.physics.radiometry`), the candidate shifts of all blocks
(down to ``plausibility_ratio`` of the best peak, and always the one nearest zero shift)
are grouped, and the median apparent temperature each puts inside a sample of
``plausibility_modules`` footprints is measured (one windowed read per module). A
candidate replaces the fit only when it is ``plausibility_margin_k`` closer to the
expectation and itself within ``plausibility_max_error_k`` of it; among candidates the
temperature cannot tell apart (one module pitch along a row), the correlation decides.
The blocks are then refitted around the chosen candidate.

References
----------
.. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
   registration algorithms", Optics Letters 33(2), 156-158, 2008.
   doi:10.1364/OL.33.000156
.. [2] C. D. Kuglin and D. C. Hines, "The phase correlation image alignment method",
   Proc. IEEE Int. Conf. on Cybernetics and Society, 163-165, 1975.
.. [3] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
"""
from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import scipy.fft
from affine import Affine
from rasterio import features
from rasterio.windows import Window
from scipy import ndimage

from pvscan.errors import RegistrationError, RegistrationWarning

if TYPE_CHECKING:  # pragma: no cover
    import geopandas

__all__ = [
    "BlockShift",
    "Registration",
    "CorrelationPeak",
    "estimate_shift",
    "expected_module_apparent_c",
    "apply_shift",
    "phase_correlate",
    "correlation_surface",
    "upsampled_peak",
    "align_flight",
]

logger = logging.getLogger(__name__)

ProgressFn = Callable[[str, int, int], None]

# Defaults of the [register] section (pipelines/post_flight.toml holds the same values
# with their sources); used for keys a caller leaves out.
_DEFAULTS: dict[str, Any] = {
    "enabled": True,
    "max_shift_m": 3.0,
    "block_m": 150.0,
    "work_gsd_m": 0.10,
    "supersample": 4,
    "highpass_sigma_m": 3.0,
    "clip_percentile": 1.0,
    "whitening": 0.7,
    "feature": "gradient",
    "gradient_sigma_m": 0.1,
    "upsample": 20,
    "guard_factor": 2.0,
    "exclusion_m": 0.35,
    "ambiguity_ratio": 0.8,
    "min_module_fraction": 0.02,
    "min_valid_fraction": 0.2,
    "snr_min": 6.0,
    "snr_full": 20.0,
    "distinct_full": 0.2,
    "reject_m": 0.25,
    "min_confidence": 0.3,
    "min_shift_m": 0.02,
    "follow_drift": True,
    "apply_weak": False,
    "require": False,
    "plausibility": True,
    "plausibility_ratio": 0.1,
    "plausibility_candidates": 8,
    "plausibility_modules": 300,
    "plausibility_margin_k": 3.0,
    "plausibility_max_error_k": 8.0,
    "plausibility_inset": 0.2,
}


# --------------------------------------------------------------------------------------
# records
# --------------------------------------------------------------------------------------
@dataclass
class BlockShift:
    """The shift measured in one block of one ortho tile.

    Attributes
    ----------
    x, y : float
        Centre of the block in the ortho CRS [m].
    dx, dy : float
        Shift to add to the layout so it fits the image, east / north [m]
        (NaN when the block gave no usable peak).
    confidence : float
        0..1; product of the peak's signal-to-noise term and its distinctness term.
    tile : int
        Index of the ortho tile the block was read from.
    snr : float
        Peak height above the median of the correlation surface in robust standard
        deviations (1.4826 x MAD) [-].
    distinctness : float
        ``1 - second / best``: the best peak against the best value outside its main
        lobe within the search radius; near 0 when the shift is ambiguous [-].
    candidates : int
        Number of candidate peaks within ``ambiguity_ratio`` of the best one.
    used : bool
        True when the block entered the final fit (not rejected as an outlier).
    note : str
        Why a block was not used, or which candidate was taken.
    """

    x: float
    y: float
    dx: float
    dy: float
    confidence: float
    tile: int = 0
    snr: float = float("nan")
    distinctness: float = float("nan")
    candidates: int = 0
    used: bool = False
    note: str = ""

    def to_dict(self) -> dict:
        return {
            "x": _r(self.x, 3), "y": _r(self.y, 3), "dx_m": _r(self.dx, 4), "dy_m": _r(self.dy, 4),
            "confidence": _r(self.confidence, 3), "tile": int(self.tile), "snr": _r(self.snr, 2),
            "distinctness": _r(self.distinctness, 3), "candidates": int(self.candidates),
            "used": bool(self.used), "note": self.note,
        }


@dataclass
class Registration:
    """Result of :func:`estimate_shift`.

    Attributes
    ----------
    shift_m : tuple of float
        Shift applied to the layout (east, north in the ortho CRS) [m]; ``(0, 0)`` when
        none was applied. With ``follow_drift`` this is the fitted shift at the centre of
        the layout; each module then moves by the fitted shift at its own centre.
    measured_m : tuple of float
        The measured shift, whether applied or not [m] (NaN when nothing was measured).
    blocks : list of BlockShift
    residual_rotation_deg : float
        Rotation of the fitted similarity, counter-clockwise on the map [deg]
        (NaN with fewer than three usable blocks).
    residual_scale : float
        Scale of the fitted similarity [-] (1 = none; NaN with fewer than three blocks).
    confidence : float
        0..1, the confidence of the combined fit.
    applied : bool
    message : str
        One line saying what was done and why.
    notes : list of str
        Remarks (e.g. tiles that contain no layout module).
    contrast : str
        ``"warmer"`` when modules are warmer than their surroundings in the image,
        ``"cooler"`` otherwise, ``""`` when undecided.
    model : tuple of float or None
        Shift field ``(tx, ty, a, b, x0, y0)``: the shift at ``(x, y)`` is
        ``(tx + a (x - x0) - b (y - y0), ty + b (x - x0) + a (y - y0))`` [m].
    follow_drift : bool
        Whether :func:`apply_shift` uses the field (True) or the single ``shift_m``.
    """

    shift_m: tuple[float, float] = (0.0, 0.0)
    measured_m: tuple[float, float] = (float("nan"), float("nan"))
    blocks: list[BlockShift] = field(default_factory=list)
    residual_rotation_deg: float = float("nan")
    residual_scale: float = float("nan")
    confidence: float = 0.0
    applied: bool = False
    message: str = ""
    notes: list[str] = field(default_factory=list)
    contrast: str = ""
    model: tuple[float, float, float, float, float, float] | None = None
    follow_drift: bool = False

    def shift_at(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Applied shift at map points (x, y) [m] (zeros when nothing was applied)."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        if not self.applied:
            return np.zeros_like(x), np.zeros_like(y)
        if self.follow_drift and self.model is not None:
            tx, ty, a, b, x0, y0 = self.model
            return tx + a * (x - x0) - b * (y - y0), ty + b * (x - x0) + a * (y - y0)
        return np.full_like(x, self.shift_m[0]), np.full_like(y, self.shift_m[1])

    def to_dict(self) -> dict:
        """Plain-JSON record for ``summary.json``."""
        return {
            "layout_shift_m": [_r(self.shift_m[0], 4), _r(self.shift_m[1], 4)],
            "measured_shift_m": [_r(self.measured_m[0], 4), _r(self.measured_m[1], 4)],
            "applied": bool(self.applied),
            "confidence": _r(self.confidence, 3),
            "residual_rotation_deg": _r(self.residual_rotation_deg, 5),
            "residual_scale": _r(self.residual_scale, 7),
            "follow_drift": bool(self.follow_drift and self.applied and self.model is not None),
            "contrast": self.contrast,
            "message": self.message,
            "notes": list(self.notes),
            "blocks": [b.to_dict() for b in self.blocks],
        }


def _r(v, nd):
    v = float(v)
    return None if not math.isfinite(v) else round(v, nd)


# --------------------------------------------------------------------------------------
# correlation core (pure array functions)
# --------------------------------------------------------------------------------------
@dataclass
class CorrelationPeak:
    """A peak of a correlation surface.

    Attributes
    ----------
    shift : tuple of float
        ``(row, col)`` shift [px] such that ``image(r) ~ reference(r - shift)``.
    height : float
        Value of the (signed) surface at the integer peak.
    snr, distinctness : float
        See :class:`BlockShift`.
    at_limit : bool
        True when the peak lies on the rim of the search radius (the true shift may lie
        beyond it).
    """

    shift: tuple[float, float]
    height: float
    snr: float = float("nan")
    distinctness: float = float("nan")
    at_limit: bool = False


def cross_power(image: np.ndarray, reference: np.ndarray, whitening: float = 1.0,
                highpass_sigma_px: float = 0.0, dtype=np.float64) -> np.ndarray:
    """Cross-power spectrum ``F(image) conj(F(reference)) / |.|**whitening``.

    Parameters
    ----------
    image, reference : ndarray (M, N)
        Real arrays of the same shape (NaN not allowed).
    whitening : float
        0 = plain cross-correlation, 1 = phase correlation [-].
    highpass_sigma_px : float
        When > 0, both arrays are high-passed first: minus their Gaussian low-pass of
        this standard deviation [px], applied as the transfer function
        ``1 - exp(-2 pi^2 sigma^2 f^2)`` [-].
    dtype : numpy dtype
        Real precision of the transforms (float32 halves time and memory on large blocks).

    Returns
    -------
    ndarray (M, N), complex
    """
    if image.shape != reference.shape:
        raise ValueError(f"image {image.shape} and reference {reference.shape} differ in shape")
    fi = scipy.fft.fft2(np.asarray(image, dtype), workers=1)
    fr = scipy.fft.fft2(np.asarray(reference, dtype), workers=1)
    r = fi * np.conj(fr)
    del fi, fr
    if highpass_sigma_px > 0:
        f2 = np.fft.fftfreq(r.shape[0])[:, None] ** 2 + np.fft.fftfreq(r.shape[1])[None, :] ** 2
        h = -np.expm1(-2.0 * np.pi ** 2 * highpass_sigma_px ** 2 * f2)
        r *= (h * h).astype(dtype)
    if whitening > 0:
        mag = np.abs(r)
        floor = max(float(mag.max()) * 1e-9, float(np.finfo(mag.dtype).tiny))
        r /= np.maximum(mag, floor) ** np.asarray(whitening, mag.dtype)
    return r


def correlation_surface(image: np.ndarray, reference: np.ndarray, whitening: float = 1.0) -> np.ndarray:
    """Circular (phase) correlation surface; element ``[i, j]`` scores the shift ``(i, j)``
    (modulo the shape): ``image(r) ~ reference(r - (i, j))``.

    With ``whitening = 0`` this is the plain circular cross-correlation
    ``sum_r image(r) reference(r - s)``.
    """
    return scipy.fft.ifft2(cross_power(image, reference, whitening), workers=1).real


def upsampled_peak(spectrum: np.ndarray, centre: tuple[float, float], upsample: int = 20,
                   half_width: float = 1.5, sign: float = 1.0) -> tuple[float, float]:
    """Refine a correlation peak to ``1 / upsample`` pixel by the matrix-multiply DFT.

    The inverse DFT of ``spectrum`` is evaluated on a grid of spacing ``1 / upsample``
    pixel within ``half_width`` pixels of ``centre`` and its (signed) maximum returned.

    Parameters
    ----------
    spectrum : ndarray (M, N), complex
        Cross-power spectrum (:func:`cross_power`).
    centre : (float, float)
        Integer peak ``(row, col)`` [px], signed (may be negative).
    upsample : int
        Sub-pixel factor [-].
    half_width : float
        Half size of the refined region [px].
    sign : float
        +1 to find a maximum, -1 for a minimum.

    Returns
    -------
    (float, float)
        Refined shift ``(row, col)`` [px].

    References
    ----------
    .. [1] Guizar-Sicairos, Thurman and Fienup (2008), Optics Letters 33(2), 156-158.
    """
    m, n = spectrum.shape
    up = max(int(upsample), 1)
    k = int(math.ceil(half_width * up))
    offs = np.arange(-k, k + 1) / up
    rows = centre[0] + offs
    cols = centre[1] + offs
    fr = np.fft.fftfreq(m)
    fc = np.fft.fftfreq(n)
    cdt = np.complex64 if spectrum.dtype == np.complex64 else np.complex128
    kr = np.exp(2j * np.pi * rows[:, None] * fr[None, :]).astype(cdt)  # (R, M)
    kc = np.exp(2j * np.pi * fc[:, None] * cols[None, :]).astype(cdt)  # (N, C)
    vals = (kr @ spectrum @ kc).real * sign
    i, j = np.unravel_index(int(np.argmax(vals)), vals.shape)
    return float(rows[i]), float(cols[j])


def _search_region(surface: np.ndarray, radius_px: float) -> tuple[np.ndarray, int]:
    r = int(math.floor(radius_px))
    m, n = surface.shape
    r = max(0, min(r, (m - 1) // 2, (n - 1) // 2))
    idx_r = np.arange(-r, r + 1) % m
    idx_c = np.arange(-r, r + 1) % n
    region = surface[np.ix_(idx_r, idx_c)].copy()
    yy, xx = np.mgrid[-r:r + 1, -r:r + 1]
    region[(yy * yy + xx * xx) > radius_px * radius_px + 1e-9] = -np.inf
    return region, r


def _peaks(region: np.ndarray, r: int, exclusion_px: float, ratio: float, near_zero: bool = False):
    """Best peak, its statistics and all candidates >= ratio * best (integer offsets).

    With ``near_zero`` the local maximum nearest to the zero shift (within
    ``exclusion_px``) is kept too, whatever its height (the layout as drawn is always a
    hypothesis)."""
    finite = np.isfinite(region)
    vals = region[finite]
    best_i = int(np.argmax(np.where(finite, region, -np.inf)))
    bi, bj = np.unravel_index(best_i, region.shape)
    best = float(region[bi, bj])
    med = float(np.median(vals))
    mad = float(np.median(np.abs(vals - med))) * 1.4826
    snr = (best - med) / mad if mad > 0 else (math.inf if best > med else 0.0)
    yy, xx = np.mgrid[-r:r + 1, -r:r + 1]
    d2 = (yy - (bi - r)) ** 2 + (xx - (bj - r)) ** 2
    outside = finite & (d2 > exclusion_px * exclusion_px)
    second = float(region[outside].max()) if outside.any() else -np.inf
    # distinctness measured above the surface's median, so a constant offset does not count
    if best - med > 0:
        distinct = 1.0 - max(second - med, 0.0) / (best - med)
    else:
        distinct = 0.0
    size = max(3, int(2 * math.floor(exclusion_px) + 1))
    filled = np.where(finite, region, -np.inf)
    locmax = (ndimage.maximum_filter(filled, size=size, mode="constant", cval=-np.inf) == filled) & finite
    thr = med + ratio * (best - med)
    ci, cj = np.nonzero(locmax & (filled >= thr))
    order = np.argsort(-filled[ci, cj])
    cands = [(int(ci[k] - r), int(cj[k] - r), float(filled[ci[k], cj[k]])) for k in order]
    if not cands or (cands[0][0], cands[0][1]) != (bi - r, bj - r):
        cands.insert(0, (int(bi - r), int(bj - r), best))
    if near_zero and not any(c[0] ** 2 + c[1] ** 2 <= exclusion_px ** 2 for c in cands):
        zi, zj = np.nonzero(locmax)
        d2z = (zi - r) ** 2 + (zj - r) ** 2
        if len(d2z) and d2z.min() <= exclusion_px ** 2:
            k = int(np.argmin(d2z))
            cands.append((int(zi[k] - r), int(zj[k] - r), float(filled[zi[k], zj[k]])))
    return (int(bi - r), int(bj - r)), best, snr, distinct, cands


def phase_correlate(image: np.ndarray, reference: np.ndarray, max_shift_px: float, *,
                    whitening: float = 1.0, upsample: int = 20, exclusion_px: float = 3.0,
                    sign: float = 1.0) -> CorrelationPeak:
    """Shift of ``image`` against ``reference`` within a search radius, sub-pixel.

    Parameters
    ----------
    image, reference : ndarray (M, N)
        Real arrays of one shape (zero-mean, tapered arrays work best).
    max_shift_px : float
        Search radius [px]; only shifts within it are considered.
    whitening : float
        0 = cross-correlation, 1 = phase correlation [-].
    upsample : int
        Sub-pixel factor of the refinement [-].
    exclusion_px : float
        Radius of the main lobe excluded when looking for the second-best peak [px].
    sign : float
        +1 when the image resembles the reference, -1 when it resembles its negative.

    Returns
    -------
    CorrelationPeak
        ``shift = (row, col)`` [px] with ``image(r) ~ reference(r - shift)``.
    """
    spec = cross_power(image, reference, whitening)
    surf = scipy.fft.ifft2(spec, workers=1).real * sign
    region, r = _search_region(surf, max_shift_px)
    (pi, pj), best, snr, distinct, _ = _peaks(region, r, exclusion_px, 1.0)
    at_limit = math.hypot(pi, pj) > max_shift_px - 1.0
    ref = upsampled_peak(spec, (pi, pj), upsample, sign=sign)
    return CorrelationPeak(ref, best, snr, distinct, at_limit)


# --------------------------------------------------------------------------------------
# helpers on blocks
# --------------------------------------------------------------------------------------
def _settings(settings) -> dict:
    out = dict(_DEFAULTS)
    if settings is None:
        try:
            from pvscan.io.settings import load_pipeline

            settings = load_pipeline()["register"]
        except Exception:  # defaults above are the same values
            settings = {}
    if isinstance(settings, Mapping) and "register" in settings and isinstance(settings["register"], Mapping):
        settings = settings["register"]
    for k, v in dict(settings).items():
        out[k] = v
    from pvscan.errors import PipelineError
    from pvscan.io.resources import describe_error, load_schema, schema_errors

    errs = schema_errors(out, load_schema("pipeline/register.schema.json"))
    if errs:
        raise PipelineError(f"[register] settings: {describe_error(errs[0], prefix='register.')}")
    return out


def _nan_reduce(a: np.ndarray, f: int) -> np.ndarray:
    """Block mean over f x f pixels ignoring NaN (NaN where a block has no valid pixel)."""
    if f == 1:
        return a.astype(np.float64)
    h, w = a.shape[0] // f, a.shape[1] // f
    a = a[: h * f, : w * f].reshape(h, f, w, f)
    valid = np.isfinite(a)
    s = np.where(valid, a, 0.0).sum(axis=(1, 3), dtype=np.float64)
    c = valid.sum(axis=(1, 3))
    out = np.full((h, w), np.nan)
    np.divide(s, c, out=out, where=c > 0)
    return out


def _as_mappings(geoms) -> list:
    """GeoJSON-like mappings of simple polygons, built vectorised (rasterio would otherwise
    call each geometry's ``__geo_interface__``, which dominates on thousands of modules)."""
    import shapely

    geoms = np.asarray(geoms, dtype=object)
    simple = (shapely.get_type_id(geoms) == 3) & (shapely.get_num_interior_rings(geoms) == 0)
    out: list = list(geoms)
    if simple.any():
        idx = np.nonzero(simple)[0]
        rings = shapely.get_exterior_ring(geoms[idx])
        coords, which = shapely.get_coordinates(rings, return_index=True)
        bounds = np.searchsorted(which, np.arange(len(idx) + 1))
        for k, i in enumerate(idx):
            out[i] = {"type": "Polygon", "coordinates": [coords[bounds[k]:bounds[k + 1]].tolist()]}
    return out


def _coverage(geoms, shape, transform: Affine, ss: int) -> np.ndarray:
    """Fraction of each pixel covered by the footprints (ss x ss samples per pixel)."""
    h, w = shape
    if not len(geoms):
        return np.zeros(shape)
    fine = features.rasterize(((g, 1) for g in _as_mappings(geoms)), out_shape=(h * ss, w * ss),
                              transform=transform @ Affine.scale(1.0 / ss), fill=0, dtype="uint8")
    counts = fine.reshape(h, ss, w, ss).sum(axis=(1, 3), dtype=np.uint16)
    return counts * (1.0 / (ss * ss))


def _taper(shape, width_px: float) -> np.ndarray:
    def one(n):
        w = np.ones(n)
        k = int(min(max(width_px, 1), n // 2))
        if k > 0:
            ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(k) + 0.5) / k)
            w[:k] = ramp
            w[n - k:] = ramp[::-1]
        return w

    return one(shape[0])[:, None] * one(shape[1])[None, :]


def _fast_shape(shape):
    return tuple(scipy.fft.next_fast_len(int(s), real=False) for s in shape)


def _pad(a, shape):
    out = np.zeros(shape)
    out[: a.shape[0], : a.shape[1]] = a
    return out


def _tile_attr(tile, name, default=None):
    return getattr(tile, name, default) if not isinstance(tile, Mapping) else tile.get(name, default)


def _tile_gsd(tile) -> float:
    g = _tile_attr(tile, "gsd_m")
    if g:
        return float(g)
    t = _tile_attr(tile, "transform")
    return float(math.sqrt(abs(t.a * t.e - t.b * t.d)))


def _read_reduced(orthos, tile_index: int, window: Window, f: int, stripe_px: int = 1024) -> np.ndarray:
    """Read a window in stripes and reduce by f x f (memory bounded by a stripe)."""
    h, w = int(window.height), int(window.width)
    step = max(f, (stripe_px // f) * f)
    parts = []
    for r0 in range(0, h, step):
        rh = min(step, h - r0)
        win = Window(window.col_off, window.row_off + r0, w, rh)
        arr = np.asarray(orthos.read(tile_index, win), dtype=np.float64)
        if arr.ndim == 3:
            arr = arr[0]
        parts.append(_nan_reduce(arr, f))
    return np.vstack(parts) if parts else np.zeros((0, w // f))


@dataclass
class _BlockData:
    tile: int
    x: float
    y: float
    lin: np.ndarray  # 2x2: (dcol, drow) work px -> (dx, dy) m
    radius_px: float
    vote: float = 0.0
    # sign -> (snr, distinctness, beyond (dx, dy) or None, [(row, col, height, row_refined, col_refined), ...])
    peaks: dict = field(default_factory=dict)
    record: BlockShift | None = None


_MAX_CANDIDATES = 6


def _analyse_block(bd: _BlockData, spec: np.ndarray, cfg: Mapping, signs) -> None:
    """Peaks of one block's correlation surface, refined at once (the spectrum is dropped
    afterwards, so memory does not grow with the number of blocks)."""
    surf = scipy.fft.ifft2(spec, workers=1).real
    region, r = _search_region(surf, bd.radius_px)
    v = region[np.isfinite(region)]
    med = float(np.median(v))
    mad = float(np.median(np.abs(v - med))) * 1.4826 or 1.0
    bd.vote = (float(v.max()) - med) / mad - (med - float(v.min())) / mad
    work_gsd = math.sqrt(abs(np.linalg.det(bd.lin)))
    ex = max(2.0, float(cfg["exclusion_m"]) / work_gsd)
    up = int(cfg["upsample"])
    # guard ring: a stronger peak beyond max_shift_m means the true offset may lie outside
    # the search radius (and the best peak inside it is an alias)
    guard_px = bd.radius_px * float(cfg["guard_factor"])
    med_by_sign = {sg: float(np.median(region[np.isfinite(region)] * sg)) for sg in signs}
    if guard_px > bd.radius_px:
        ring, rg = _search_region(surf, guard_px)
        yy, xx = np.mgrid[-rg:rg + 1, -rg:rg + 1]
        ring[(yy * yy + xx * xx) <= bd.radius_px * bd.radius_px + 1e-9] = -np.inf
    else:
        ring = None
    for sg in signs:
        med_r = med_by_sign[sg]
        # candidates down to half the best peak: the fit may re-admit one of them later;
        # with the plausibility test, weaker ones too (and the one nearest zero shift)
        keep = min(float(cfg["ambiguity_ratio"]), 0.5)
        plaus = bool(cfg["plausibility"])
        if plaus:
            keep = min(keep, float(cfg["plausibility_ratio"]))
        (pi, pj), best, snr, distinct, cands = _peaks(region * sg, r, ex, keep, near_zero=plaus)
        n_keep = _MAX_CANDIDATES + (int(cfg["plausibility_candidates"]) if plaus else 0)
        refined = []
        for k, (ci, cj, h) in enumerate(cands):
            if k < _MAX_CANDIDATES:
                fr, fc = upsampled_peak(spec, (ci, cj), up, half_width=1.0, sign=sg)
            elif k < n_keep or ci * ci + cj * cj <= ex * ex:
                # weak candidates serve the plausibility test: a parabolic vertex suffices
                fr, fc = _parabolic_peak(region * sg, r, ci, cj)
            else:
                continue
            refined.append((ci, cj, h, fr, fc))
        beyond = None
        if ring is not None:
            rs = np.where(np.isfinite(ring), ring * sg, -np.inf)
            k = int(np.argmax(rs))
            if rs.flat[k] > best:
                bi, bj = np.unravel_index(k, rs.shape)
                d = bd.lin @ np.array([bj - rg, bi - rg])
                beyond = (float(d[0]), float(d[1]))
            # a near-equal peak just beyond the radius makes the block ambiguous too
            if best > med_r:
                distinct = min(distinct, 1.0 - max(float(rs.flat[k]) - med_r, 0.0) / (best - med_r))
        bd.peaks[sg] = (float(snr), max(float(distinct), 0.0), beyond, refined, med_r)


def _parabolic_peak(region: np.ndarray, r: int, ci: int, cj: int) -> tuple[float, float]:
    """Sub-pixel vertex of a peak of the search region by a 3-point parabola per axis [px]."""
    out = []
    for axis, c in ((0, ci), (1, cj)):
        i, j = ci + r, cj + r
        lo = (i - 1, j) if axis == 0 else (i, j - 1)
        hi = (i + 1, j) if axis == 0 else (i, j + 1)
        n = region.shape[axis]
        if min(lo[axis], hi[axis]) < 0 or max(lo[axis], hi[axis]) >= n:
            out.append(float(c))
            continue
        a, b, d = region[lo], region[i, j], region[hi]
        den = a - 2.0 * b + d
        if not (np.isfinite(a) and np.isfinite(d)) or den >= 0:
            out.append(float(c))
            continue
        out.append(float(c) + float(np.clip(0.5 * (a - d) / den, -0.5, 0.5)))
    return out[0], out[1]


def _prepare_block(orthos, ti, tile, win, mod_geoms, cfg, f, work_gsd):
    """Read one block and build the cross-power spectrum; None with a note when unusable."""
    t = _tile_attr(tile, "transform")
    img = _read_reduced(orthos, ti, win, f)
    h, w = img.shape
    if h < 8 or w < 8:
        return None, "block too small"
    wt = t @ Affine.translation(win.col_off, win.row_off) @ Affine.scale(f)
    valid = np.isfinite(img)
    vfrac = float(valid.mean())
    if vfrac < cfg["min_valid_fraction"]:
        return None, f"valid pixels {vfrac:.0%} < min_valid_fraction"
    cov = _coverage(mod_geoms, (h, w), wt, int(cfg["supersample"]))
    mfrac = float(cov[valid].mean()) if valid.any() else 0.0
    if mfrac < cfg["min_module_fraction"]:
        return None, f"module area {mfrac:.1%} < min_module_fraction"
    # clip to the central (100 - 2 p) % of the values: hot spots and dead pixels do not
    # dominate, while the module/ground contrast (two modes inside that range) is kept
    # intact (a clip on a MAD scale would cut the module plateau and widen the tables)
    p = float(cfg["clip_percentile"])
    lo, hi = np.percentile(img[valid], [p, 100.0 - p])
    if not hi > lo:
        return None, "no contrast"
    z = (np.clip(img, lo, hi) - lo) / (hi - lo)
    if cfg["feature"] == "gradient":
        # edges whatever their polarity: ground may be warmer on one side of a table
        # (sunlit) and cooler on the other (shade)
        gs = max(float(cfg["gradient_sigma_m"]) / work_gsd, 0.5)
        zf = np.where(valid, z, float(np.median(z[valid])))
        z = ndimage.gaussian_gradient_magnitude(zf, gs, mode="nearest")
        near_gap = ndimage.binary_dilation(~valid, iterations=int(math.ceil(3 * gs)) + 1)
        ok = ~near_gap
        if not ok.any():
            return None, "no valid pixels away from nodata"
        z = np.where(ok, z - float(z[ok].mean()), 0.0)
        zm = ndimage.gaussian_gradient_magnitude(cov, gs, mode="nearest")
        zm -= float(zm.mean())
    else:
        z = np.where(valid, z - float(z[valid].mean()), 0.0)
        zm = cov - float(cov.mean())
    taper = _taper((h, w), float(cfg["max_shift_m"]) / work_gsd)
    z *= taper
    zm *= taper
    if not np.any(z) or not np.any(zm):
        return None, "no contrast"
    shape = _fast_shape((h, w))
    spec = cross_power(_pad(z, shape), _pad(zm, shape), float(cfg["whitening"]),
                       float(cfg["highpass_sigma_m"]) / work_gsd, dtype=np.float32)
    lin = np.array([[wt.a, wt.b], [wt.d, wt.e]])
    cx, cy = wt @ (w / 2.0, h / 2.0)
    signs = (1.0,) if cfg["feature"] == "gradient" else (1.0, -1.0)
    bd = _BlockData(ti, float(cx), float(cy), lin, float(cfg["max_shift_m"]) / work_gsd)
    _analyse_block(bd, spec, cfg, signs)
    return bd, ""


def _block_windows(tile, geoms_bounds, cfg):
    """Pixel windows (with margin) of the blocks of one tile over the layout's extent."""
    t = _tile_attr(tile, "transform")
    width, height = int(_tile_attr(tile, "width")), int(_tile_attr(tile, "height"))
    inv = ~t
    margin = float(cfg["max_shift_m"]) * 1.5
    minx, miny, maxx, maxy = geoms_bounds
    corners = [(minx - margin, miny - margin), (minx - margin, maxy + margin),
               (maxx + margin, miny - margin), (maxx + margin, maxy + margin)]
    cols, rows = zip(*(inv @ c for c in corners))
    c0, c1 = max(0, int(math.floor(min(cols)))), min(width, int(math.ceil(max(cols))))
    r0, r1 = max(0, int(math.floor(min(rows)))), min(height, int(math.ceil(max(rows))))
    if c1 - c0 < 8 or r1 - r0 < 8:
        return []
    gsd = _tile_gsd(tile)
    block_px = max(16, int(round(float(cfg["block_m"]) / gsd)))
    margin_px = int(math.ceil(margin / gsd))
    nx = max(1, int(round((c1 - c0) / block_px)))
    ny = max(1, int(round((r1 - r0) / block_px)))
    xs = np.linspace(c0, c1, nx + 1).round().astype(int)
    ys = np.linspace(r0, r1, ny + 1).round().astype(int)
    out = []
    for j in range(ny):
        for i in range(nx):
            a0 = max(0, xs[i] - (margin_px if i > 0 else 0))
            a1 = min(width, xs[i + 1] + (margin_px if i < nx - 1 else 0))
            b0 = max(0, ys[j] - (margin_px if j > 0 else 0))
            b1 = min(height, ys[j + 1] + (margin_px if j < ny - 1 else 0))
            out.append(Window(a0, b0, a1 - a0, b1 - b0))
    return out


def _fit_similarity(x, y, dx, dy, w):
    """Weighted least-squares shift field ``(tx, ty, a, b, x0, y0)`` (see Registration.model)."""
    x0 = float(np.average(x, weights=w))
    y0 = float(np.average(y, weights=w))
    xc, yc = x - x0, y - y0
    n = len(x)
    A = np.zeros((2 * n, 4))
    A[0::2, 0] = 1
    A[0::2, 2] = xc
    A[0::2, 3] = -yc
    A[1::2, 1] = 1
    A[1::2, 2] = yc
    A[1::2, 3] = xc
    rhs = np.empty(2 * n)
    rhs[0::2] = dx
    rhs[1::2] = dy
    sw = np.sqrt(np.repeat(w, 2))
    sol, *_ = np.linalg.lstsq(A * sw[:, None], rhs * sw, rcond=None)
    return (float(sol[0]), float(sol[1]), float(sol[2]), float(sol[3]), x0, y0)


def _weighted_median(v, w):
    o = np.argsort(v)
    cw = np.cumsum(w[o])
    return float(v[o][np.searchsorted(cw, 0.5 * cw[-1])])


def _spread_enough(x, y, min_extent):
    if len(x) < 3:
        return False
    pts = np.column_stack([x - x.mean(), y - y.mean()])
    sv = np.linalg.svd(pts, compute_uv=False)
    return sv[-1] / math.sqrt(len(x)) > min_extent



# --------------------------------------------------------------------------------------
# physical plausibility of a candidate shift
# --------------------------------------------------------------------------------------
def expected_module_apparent_c(flight: Any, pipeline: Any = None, *, strict: bool = True) -> float:
    """Apparent temperature of sunlit module glass at the flight's conditions [degC].

    The true temperature follows the Faiman model, ``T = T_air + G / (u0 + u1 v)``
    (``G`` the plane-of-array irradiance [W/m2], ``v`` the wind speed [m/s], ``u0``,
    ``u1`` of the ``[reference]`` section), at the flight's mean conditions
    (:func:`pvscan.measure.conditions.flight_conditions`); it is turned into what the export
    reports with :func:`pvscan.physics.radiometry.apparent_from_true` and the keywords of
    :func:`pvscan.physics.radiometry.flight_radiometry` (module emissivity, reflected sky, the
    export's emissivity and reflected temperature, air path).

    Parameters
    ----------
    flight : Flight
        From :func:`pvscan.io.manifest.load_flight`.
    pipeline : Pipeline, optional
        Its ``[conditions]``, ``[reference]`` (``u0``, ``u1``) and ``[radiometry]``
        sections are used; default :func:`pvscan.io.settings.load_pipeline`.
    strict : bool
        When False, a flight without usable conditions gives NaN (which switches the
        plausibility test of :func:`estimate_shift` off) instead of raising.

    Returns
    -------
    float
        [degC]

    Raises
    ------
    ConditionsError
        With ``strict``, when the flight gives neither constants nor a series for
        irradiance, air temperature and wind.

    References
    ----------
    .. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic
       modules", Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    if not strict:
        from pvscan.errors import PvscanError

        try:
            return expected_module_apparent_c(flight, pipeline, strict=True)
        except (PvscanError, AttributeError, TypeError, ValueError) as exc:
            logger.info("register: no expected module temperature for the plausibility test (%s)", exc)
            return float("nan")
    import pandas as pd

    from pvscan.physics import radiometry
    from pvscan.measure.conditions import flight_conditions
    from pvscan.diagnose.thermal import U0_FAIMAN, U1_FAIMAN

    if pipeline is None:
        from pvscan.io.settings import load_pipeline

        pipeline = load_pipeline()

    def section(name):
        try:
            return pipeline[name]
        except (KeyError, TypeError):
            return {}

    fc = flight_conditions(flight.conditions, flight.flight.start, flight.flight.end,
                           settings=section("conditions"))
    ref = section("reference")
    u = float(ref.get("u0", U0_FAIMAN)) + float(ref.get("u1", U1_FAIMAN)) * float(fc.wind_speed)
    t_true = float(fc.temp_air) + float(fc.poa_global) / u
    rh = fc.relative_humidity
    cond = pd.DataFrame({"temp_air": [float(fc.temp_air)], "temp_sky": [float(fc.temp_sky)],
                         "relative_humidity": [float("nan") if rh is None else float(rh)]})
    kw = radiometry.flight_radiometry(flight, cond, section("radiometry") or None)
    kw = {k: (float(np.asarray(v).reshape(-1)[0]) if k != "band_um" and np.ndim(v) else v) for k, v in kw.items()}
    return float(np.asarray(radiometry.apparent_from_true(t_true, **kw)).reshape(-1)[0])




def _module_samples(orthos, tiles, geoms, cfg):
    """Sample points inside a subset of module footprints and one windowed read each.

    Returns a list of ``(x, y, tile_index, transform, col_off, row_off, array)`` [m, px]."""
    import shapely

    n = len(geoms)
    if n == 0:
        return []
    k = min(n, int(cfg["plausibility_modules"]))
    idx = np.unique(np.linspace(0, n - 1, k).round().astype(int))
    g = geoms[idx]
    area = shapely.area(g)
    perim = shapely.length(g)
    # inset: a fraction of the footprint's inscribed half-width 2A/P (w l / (w + l) for a
    # w x l rectangle), so the points stay on the glass at a slightly wrong shift
    inset = float(cfg["plausibility_inset"]) * np.where(perim > 0, 2.0 * area / np.maximum(perim, 1e-12), 0.0)
    inner = shapely.buffer(g, -inset)
    reach = float(cfg["max_shift_m"]) + 0.5  # candidates lie within the search radius
    bounds = [(_tile_attr(t, "bounds"), _tile_attr(t, "transform"), int(_tile_attr(t, "width")),
               int(_tile_attr(t, "height"))) for t in tiles]
    out = []
    grid = (np.arange(9) + 0.5) / 9.0
    for poly in inner:
        if poly is None or shapely.is_empty(poly):
            continue
        x0, y0, x1, y1 = shapely.bounds(poly)
        gx, gy = np.meshgrid(x0 + grid * (x1 - x0), y0 + grid * (y1 - y0))
        gx, gy = gx.ravel(), gy.ravel()
        inside = shapely.contains_xy(poly, gx, gy)
        if inside.sum() < 3:
            continue
        gx, gy = gx[inside], gy[inside]
        cx, cy = float(gx.mean()), float(gy.mean())
        for ti, ((l, b, r, t), tr, w, h) in enumerate(bounds):
            if l <= cx <= r and b <= cy <= t:
                break
        else:
            continue
        inv = ~tr
        cols, rows = zip(*(inv @ (xx, yy) for xx in (x0 - reach, x1 + reach) for yy in (y0 - reach, y1 + reach)))
        c0, c1 = max(0, int(math.floor(min(cols)))), min(w, int(math.ceil(max(cols))))
        r0, r1 = max(0, int(math.floor(min(rows)))), min(h, int(math.ceil(max(rows))))
        if c1 - c0 < 1 or r1 - r0 < 1:
            continue
        arr = np.asarray(orthos.read(ti, Window(c0, r0, c1 - c0, r1 - r0)), dtype=np.float64)
        if arr.ndim == 3:
            arr = arr[0]
        out.append((gx, gy, tr, c0, r0, arr))
    return out


def _median_at(samples, shift) -> tuple[float, int]:
    """Median over the sampled modules of each module's median apparent temperature
    with the footprints moved by ``shift`` [degC], and the number of modules measured."""
    meds = []
    for gx, gy, tr, c0, r0, arr in samples:
        inv = ~tr
        xs, ys = gx + shift[0], gy + shift[1]
        cols = inv.a * xs + inv.b * ys + inv.c
        rows = inv.d * xs + inv.e * ys + inv.f
        ci = np.floor(np.asarray(cols)).astype(int) - c0
        ri = np.floor(np.asarray(rows)).astype(int) - r0
        ok = (ci >= 0) & (ri >= 0) & (ci < arr.shape[1]) & (ri < arr.shape[0])
        v = arr[ri[ok], ci[ok]]
        v = v[np.isfinite(v)]
        if v.size * 2 >= gx.size:
            meds.append(float(np.median(v)))
    if len(meds) < 3:
        return float("nan"), len(meds)
    return float(np.median(meds)), len(meds)


def _shift_clusters(blocks, phys_all, to_m, radius_m):
    """Candidate shifts of all blocks grouped within ``radius_m``: ``[(centre, score)]``,
    score = SNR-weighted mean over the blocks of the relative peak height (0 where a block
    has no candidate in the group), best first."""
    pts = []
    weights = []
    for i, (bd, (ext, med, snr, ok)) in enumerate(zip(blocks, phys_all)):
        wb = max(float(snr), 1e-3) if ok else 1e-3
        weights.append(wb)
        top = ext[0][2] - med
        if top <= 0:
            continue
        for c in ext:
            m = to_m(bd, c[3], c[4])
            pts.append((m[0], m[1], (c[2] - med) / top, wb, i))
    pts.sort(key=lambda p: -p[2] * p[3])
    clusters: list[dict] = []
    for x, y, h, wb, i in pts:
        for cl in clusters:
            if math.hypot(x - cl["x"], y - cl["y"]) <= radius_m:
                if i not in cl["h"]:
                    cl["h"][i] = (h, wb)
                    cl["sx"] += x * h * wb
                    cl["sy"] += y * h * wb
                    cl["sw"] += h * wb
                break
        else:
            clusters.append({"x": x, "y": y, "h": {i: (h, wb)}, "sx": x * h * wb, "sy": y * h * wb,
                             "sw": h * wb})
    total = float(sum(weights))
    out = []
    for cl in clusters:
        score = sum(h * wb for h, wb in cl["h"].values()) / total
        c = (cl["sx"] / cl["sw"], cl["sy"] / cl["sw"]) if cl["sw"] > 0 else (cl["x"], cl["y"])
        out.append((c, float(score)))
    out.sort(key=lambda t: -t[1])
    return out


def _plausibility(orthos, tiles, geoms, blocks, phys_all, to_m, fitted, expected_c, cfg):
    """Test the fitted shift against the other candidate shifts by the module glass's
    apparent temperature; returns ``(note, switch)`` with ``switch = (centre, factor)``
    when another candidate is clearly more plausible, else None."""
    radius = float(cfg["reject_m"])
    ratio = float(cfg["plausibility_ratio"])
    clusters = _shift_clusters(blocks, phys_all, to_m, radius)
    cands = []
    for c, score in clusters:
        if math.hypot(c[0] - fitted[0], c[1] - fitted[1]) <= radius:
            continue
        near_zero = math.hypot(*c) <= radius
        if score >= ratio or near_zero:
            cands.append((c, score))
        if len(cands) >= int(cfg["plausibility_candidates"]):
            break
    if not cands:
        return "", None
    samples = _module_samples(orthos, tiles, geoms, cfg)
    t_fit, n_fit = _median_at(samples, fitted)
    if not math.isfinite(t_fit):
        return "plausibility test skipped: too few modules sampled", None
    margin = float(cfg["plausibility_margin_k"])
    d_fit = abs(t_fit - expected_c)
    tested = []
    for c, score in cands:
        t_c, _ = _median_at(samples, c)
        if math.isfinite(t_c):
            tested.append((c, abs(t_c - expected_c), t_c, score))
    head = (f"plausibility: modules at the fitted shift ({fitted[0]:+.2f}, {fitted[1]:+.2f}) m read "
            f"{t_fit:.1f} degC (median of {n_fit}), expected {expected_c:.1f} degC for sunlit glass")
    # candidates clearly more plausible than the fit and plausible in themselves
    better = [t for t in tested if d_fit - t[1] > margin and t[1] <= float(cfg["plausibility_max_error_k"])]
    if not better:
        return head + "; fit kept", None
    # among those the temperature cannot tell apart (e.g. one module pitch along a row:
    # glass either way), the correlation decides
    d_min = min(t[1] for t in better)
    tied = sorted((t for t in better if t[1] <= d_min + 0.5 * margin), key=lambda t: -t[3])
    c, d_c, t_c, score = tied[0]
    factor = min(max((d_fit - d_c) / (2.0 * margin), 0.0), 1.0)
    # a rival the temperature cannot tell apart, scoring nearly as well, leaves the
    # choice ambiguous: the confidence falls with the correlation's own distinctness
    rivals = [t[3] for t in tied[1:] if math.hypot(t[0][0] - c[0], t[0][1] - c[1]) > radius]
    if rivals and score > 0:
        factor *= min(max((1.0 - max(rivals) / score) / float(cfg["distinct_full"]), 0.0), 1.0)
    note = (f"{head}; candidate ({c[0]:+.2f}, {c[1]:+.2f}) m (correlation score {score:.2f} of the best) "
            f"reads {t_c:.1f} degC and was taken instead")
    return note, (c, factor)

# --------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------
def estimate_shift(orthos: Any, modules: geopandas.GeoDataFrame, settings: Mapping | None = None, *,
                   progress: ProgressFn | None = None, expected_apparent_c: float | None = None,
                   flight: Any = None) -> Registration:
    """Measure the layout-to-ortho offset from the image.

    Parameters
    ----------
    orthos : OrthoSet
        ``.tiles`` (each with ``transform``, ``crs``, ``width``, ``height``, ``bounds``,
        ``gsd_m``) and ``.read(tile_index, window) -> float32`` apparent temperature
        [degC] with NaN for nodata. Only windowed reads are made.
    modules : geopandas.GeoDataFrame
        Module footprints in the ortho CRS [m].
    settings : mapping, optional
        The ``[register]`` section (or a whole pipeline); missing keys take the defaults.
    progress : callable, optional
        ``progress("register", done, total)`` after each block.
    expected_apparent_c : float, optional
        Apparent temperature the camera export should report for sunlit module glass at
        the flight's conditions [degC] (:func:`expected_module_apparent_c`). When given
        (and ``plausibility`` is on), candidate shifts that the correlation scores close
        to the best are told apart by the median apparent temperature they put inside a
        sample of module footprints: a fit that lays the footprints on an equally wide,
        cooler shadow strip is replaced by the candidate whose modules look like modules.
    flight : Flight, optional
        Used only when ``expected_apparent_c`` is not given, to compute it with
        :func:`expected_module_apparent_c` and the default pipeline's ``[conditions]``,
        ``[reference]`` and ``[radiometry]`` sections (skipped with a log line when the
        flight lacks the conditions). A caller with its own pipeline passes
        ``expected_apparent_c=expected_module_apparent_c(flight, pipeline, strict=False)``.

    Returns
    -------
    Registration
        ``shift_m`` is to be *added* to the layout coordinates (east, north) [m].

    Warns
    -----
    RegistrationWarning
        When the image constrains the fit weakly; no shift is applied then unless
        ``apply_weak`` is set.

    Raises
    ------
    RegistrationError
        When ``require`` is set and no confident fit is found.
    """
    cfg = _settings(settings)
    if not cfg["enabled"]:
        return Registration(message="registration disabled ([register] enabled = false)")
    tiles = list(orthos.tiles)
    notes: list[str] = []
    if tiles and getattr(modules, "crs", None) is not None and _tile_attr(tiles[0], "crs") is not None:
        from pyproj import CRS

        tc = CRS.from_user_input(_tile_attr(tiles[0], "crs"))
        if CRS.from_user_input(modules.crs) != tc:
            raise RegistrationError(f"layout CRS {CRS.from_user_input(modules.crs).to_string()} differs from the "
                                    f"ortho CRS {tc.to_string()}; reproject the modules first")
    geoms = np.asarray(modules.geometry.values, dtype=object) if len(modules) else np.zeros(0, object)
    import shapely

    valid_geom = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms)) if len(geoms) else np.zeros(0, bool)
    geoms = geoms[valid_geom]
    tree = shapely.STRtree(geoms) if len(geoms) else None

    # 1. plan blocks per tile
    plan = []
    for ti, tile in enumerate(tiles):
        name = _tile_attr(tile, "path") or _tile_attr(tile, "name") or f"tile {ti}"
        l, b, r, t = _tile_attr(tile, "bounds")
        idx = tree.query(shapely.box(l, b, r, t), predicate="intersects") if tree is not None else []
        if len(idx) == 0:
            notes.append(f"ortho tile {ti} ({name}): no layout module; ignored")
            continue
        sub = geoms[np.sort(idx)]
        gb = shapely.total_bounds(sub)
        gb = (max(gb[0], l), max(gb[1], b), min(gb[2], r), min(gb[3], t))
        for win in _block_windows(tile, gb, cfg):
            plan.append((ti, tile, win))

    # 2. spectra of the blocks
    blocks: list[_BlockData] = []
    records: list[BlockShift] = []
    total = len(plan)
    for k, (ti, tile, win) in enumerate(plan):
        t = _tile_attr(tile, "transform")
        gsd = _tile_gsd(tile)
        f = max(1, int(math.floor(float(cfg["work_gsd_m"]) / gsd + 1e-6)))
        work_gsd = gsd * f
        win = Window(win.col_off, win.row_off, (int(win.width) // f) * f, (int(win.height) // f) * f)
        wb = (t @ (win.col_off, win.row_off + win.height), t @ (win.col_off + win.width, win.row_off))
        xs = [wb[0][0], wb[1][0]]
        ys = [wb[0][1], wb[1][1]]
        pad = float(cfg["max_shift_m"])
        box = shapely.box(min(xs) - pad, min(ys) - pad, max(xs) + pad, max(ys) + pad)
        gidx = tree.query(box, predicate="intersects")
        bd, why = _prepare_block(orthos, ti, tile, win, geoms[np.sort(gidx)], cfg, f, work_gsd)
        cx, cy = t @ (win.col_off + win.width / 2.0, win.row_off + win.height / 2.0)
        if bd is None:
            records.append(BlockShift(float(cx), float(cy), float("nan"), float("nan"), 0.0, ti, note=why))
            logger.debug("register: block %d (tile %d) skipped: %s", k, ti, why)
        else:
            blocks.append(bd)
            records.append(BlockShift(bd.x, bd.y, float("nan"), float("nan"), 0.0, ti))
            bd.record = records[-1]
        if progress is not None:
            progress("register", k + 1, total)

    reg = Registration(notes=notes, follow_drift=bool(cfg["follow_drift"]))
    reg.blocks = records
    if not blocks:
        why = sorted({r.note for r in records if r.note}) or ["no ortho tile contains layout modules"]
        return _finish_weak(reg, cfg, "no usable ortho block (" + "; ".join(why) + ")")

    # 3. contrast sign by vote (intensity feature), then the peaks of that sign
    if cfg["feature"] == "gradient":
        sign = 1.0  # edge strengths correlate positively whatever the contrast's polarity
        reg.contrast = "edges"
    else:
        sign = 1.0 if sum(bd.vote for bd in blocks) >= 0 else -1.0
        reg.contrast = "warmer" if sign > 0 else "cooler"

    snr_min, snr_full = float(cfg["snr_min"]), float(cfg["snr_full"])
    dfull = float(cfg["distinct_full"])
    cands_all = []
    phys_all = []  # every candidate kept for the plausibility test, and the block's SNR
    keep_base = min(float(cfg["ambiguity_ratio"]), 0.5)
    for bd in blocks:
        snr, distinct, beyond, ext, med = bd.peaks[sign]
        best_h = ext[0][2]
        ratio = float(cfg["ambiguity_ratio"])
        # candidates down to half the best peak (the fit may re-admit one of them)
        cands = [c for c in ext if c[2] - med >= keep_base * (best_h - med)][:_MAX_CANDIDATES]
        # (all candidates, those within ambiguity_ratio of the best, height above median)
        cands = (cands, [c for c in cands if c[2] - med >= ratio * (best_h - med)], med)
        c_snr = min(max((snr - snr_min) / max(snr_full - snr_min, 1e-9), 0.0), 1.0)
        c_dis = min(max(distinct / max(dfull, 1e-9), 0.0), 1.0)
        conf = c_snr * c_dis
        rec = bd.record
        rec.snr, rec.distinctness, rec.candidates = snr, distinct, len(cands[1])
        if beyond is not None:
            conf = 0.0
            rec.note = (f"a stronger peak lies beyond max_shift_m, at ({beyond[0]:+.2f}, {beyond[1]:+.2f}) m")
        rec.confidence = float(conf)
        cands_all.append(cands)
        phys_all.append((ext, med, snr, beyond is None))

    # 4. consensus of confident blocks, then each block takes the candidate nearest to it
    def to_m(bd, drow, dcol):
        d = bd.lin @ np.array([dcol, drow])
        return float(d[0]), float(d[1])

    best_m = np.array([to_m(bd, c[0][0][3], c[0][0][4]) for bd, c in zip(blocks, cands_all)])
    confs = np.array([bd.record.confidence for bd in blocks])
    if expected_apparent_c is None and flight is not None:
        expected_apparent_c = expected_module_apparent_c(flight, strict=False)
    plausible = (bool(cfg["plausibility"]) and expected_apparent_c is not None
                 and math.isfinite(float(expected_apparent_c)))
    switch, note = None, ""
    if confs.max() <= 0:
        for bd, bm in zip(blocks, best_m):
            bd.record.dx, bd.record.dy = float(bm[0]), float(bm[1])
        reg.measured_m = (float(np.median(best_m[:, 0])), float(np.median(best_m[:, 1])))
        if plausible:
            # no block is distinct: the glass temperature may still pick one candidate
            note, switch = _plausibility(orthos, tiles, geoms, blocks, phys_all, to_m, reg.measured_m,
                                         float(expected_apparent_c), cfg)
        if switch is None:
            if note:
                reg.notes.append(note)
            return _finish_weak(reg, cfg, "the image does not constrain the layout position "
                                          "(no block has a distinct correlation peak)")
    cons = np.array([_weighted_median(best_m[:, 0], confs + 1e-12 * (confs <= 0)),
                     _weighted_median(best_m[:, 1], confs + 1e-12 * (confs <= 0))])
    def fit(lists, cons, conf_of=None):
        """Each block takes its candidate nearest ``cons``, then the robust fit of the field;
        sets the records and ``reg`` (model, residuals, measured shift, confidence)."""
        reg.model = None
        reg.residual_scale = reg.residual_rotation_deg = float("nan")
        reg.follow_drift = bool(cfg["follow_drift"])
        dxs, dys = [], []
        cm_all = []
        for bd, (all_c, cands, med) in zip(blocks, lists):
            rec = bd.record
            cm_all.append((np.array([to_m(bd, c[3], c[4]) for c in all_c]),
                           np.array([(c[2] - med) / max(all_c[0][2] - med, 1e-300) for c in all_c])))
            cm = np.array([to_m(bd, c[3], c[4]) for c in cands])
            k = int(np.argmin(np.hypot(cm[:, 0] - cons[0], cm[:, 1] - cons[1])))
            if conf_of is not None:
                # the plausibility test chose the shift: the block's confidence comes from
                # the chosen peak's own height and the test's margin
                if k != 0:
                    rec.note = (rec.note + "; " if rec.note else "") + \
                        f"took candidate {k + 1} of {len(cands)}, nearest the physically plausible shift"
                rec.confidence = conf_of(bd, cands[k], med)
            elif k != 0:
                rec.note = (rec.note + "; " if rec.note else "") + \
                    f"periodic ambiguity: took candidate {k + 1} of {len(cands)} nearest the consensus"
                # a block that needed the consensus to decide cannot add confidence of its own
                rec.confidence *= (cands[k][2] - med) / (cands[0][2] - med) if cands[0][2] > med else 0.0
                if rec.confidence <= 0:
                    rec.confidence = 1e-3
            rec.dx, rec.dy = float(cm[k, 0]), float(cm[k, 1])
            dxs.append(rec.dx)
            dys.append(rec.dy)

        # 5. robust fit
        x = np.array([bd.x for bd in blocks])
        y = np.array([bd.y for bd in blocks])
        dx = np.array(dxs)
        dy = np.array(dys)
        w = np.array([bd.record.confidence for bd in blocks])
        inl = w > 0
        reject = float(cfg["reject_m"])
        model = None
        for _ in range(6):
            if inl.sum() == 0:
                break
            use_sim = _spread_enough(x[inl], y[inl], float(cfg["block_m"]) * 0.25)
            if use_sim:
                model = _fit_similarity(x[inl], y[inl], dx[inl], dy[inl], w[inl])
                tx, ty, a, b, x0, y0 = model
                px = tx + a * (x - x0) - b * (y - y0)
                py = ty + b * (x - x0) + a * (y - y0)
            else:
                mx = _weighted_median(dx[inl], w[inl])
                my = _weighted_median(dy[inl], w[inl])
                model = None
                px, py = np.full_like(x, mx), np.full_like(y, my)
            res = np.hypot(dx - px, dy - py)
            for i in np.nonzero((w > 0) & (res > reject))[0]:
                # an outlier whose runner-up peak agrees with the fit took the wrong one of two
                # near-equal peaks (periodic rows): re-admit it with that peak
                cmi, hi = cm_all[i]
                d = np.hypot(cmi[:, 0] - px[i], cmi[:, 1] - py[i])
                j = int(np.argmin(d))
                if d[j] <= reject and hi[j] > 0:
                    rec = blocks[i].record
                    dx[i], dy[i] = cmi[j]
                    rec.dx, rec.dy = float(cmi[j, 0]), float(cmi[j, 1])
                    w[i] *= float(hi[j])
                    rec.confidence = float(w[i])
                    rec.note = (rec.note + "; " if rec.note else "") + \
                        f"periodic ambiguity: re-admitted with candidate {j + 1} near the fit"
                    res[i] = d[j]
            new = (w > 0) & (res <= reject)
            if not new.any():
                new = (w > 0) & (res <= np.min(res[w > 0]) + 1e-9)
            if np.array_equal(new, inl):
                break
            inl = new
        if model is None:
            cx = float(np.average(x[inl], weights=w[inl]))
            cy = float(np.average(y[inl], weights=w[inl]))
            mx = float(np.average(dx[inl], weights=w[inl]))
            my = float(np.average(dy[inl], weights=w[inl]))
            model_t = (mx, my, 0.0, 0.0, cx, cy)
            reg.model = None
        else:
            model_t = model
            reg.model = model
            a, b = model[2], model[3]
            reg.residual_scale = float(math.hypot(1.0 + a, b))
            reg.residual_rotation_deg = float(math.degrees(math.atan2(b, 1.0 + a)))
        for bd, ok, rs in zip(blocks, inl, res):
            rec = bd.record
            rec.used = bool(ok)
            if not ok and rec.confidence > 0:
                rec.note = (rec.note + "; " if rec.note else "") + f"outlier: {rs:.2f} m from the fit"
        # overall shift: the field at the centre of the layout
        lx0, ly0, lx1, ly1 = shapely.total_bounds(geoms)
        mxc, myc = (lx0 + lx1) / 2.0, (ly0 + ly1) / 2.0
        tx, ty, a, b, x0, y0 = model_t
        sx = tx + a * (mxc - x0) - b * (myc - y0)
        sy = ty + b * (mxc - x0) + a * (myc - y0)
        reg.measured_m = (float(sx), float(sy))
        if reg.model is not None:
            # the field is extrapolated to the whole layout: refuse implausible extrapolations
            # (blocks clustered in one corner) and use the single shift instead
            corners_x = np.array([lx0, lx0, lx1, lx1])
            corners_y = np.array([ly0, ly1, ly0, ly1])
            fx = tx + a * (corners_x - x0) - b * (corners_y - y0)
            fy = ty + b * (corners_x - x0) + a * (corners_y - y0)
            spread = float(np.max(np.hypot(fx - sx, fy - sy)))
            if spread > float(cfg["max_shift_m"]):
                reg.notes.append(f"shift field varies by {spread:.2f} m across the layout (more than "
                                 f"max_shift_m); one shift is used for all modules")
                reg.model = None
                reg.follow_drift = False
        # confidence: mean confidence of the used blocks times the weight fraction they hold
        wi = w[inl]
        conf = float(np.sum(wi * wi) / np.sum(wi)) * float(np.sum(wi) / np.sum(w)) if wi.sum() > 0 else 0.0
        reg.confidence = min(max(conf, 0.0), 1.0)
        return sx, sy

    n_notes = len(reg.notes)
    saved = [(bd.record.confidence, bd.record.note) for bd in blocks]
    if switch is None:
        sx, sy = fit(cands_all, cons)
        # 6. physical plausibility: among candidate shifts that score close to the best,
        # the module glass must look like sunlit modules at the flight's conditions
        if plausible:
            note, switch = _plausibility(orthos, tiles, geoms, blocks, phys_all, to_m, (sx, sy),
                                         float(expected_apparent_c), cfg)
    if switch is not None:
        centre, factor = switch
        for bd, (c0, n0) in zip(blocks, saved):
            bd.record.confidence, bd.record.note = c0, n0
        del reg.notes[n_notes:]
        snr_scale = max(snr_full - snr_min, 1e-9)
        by_block = {id(b): e for b, e in zip(blocks, phys_all)}

        def conf_of(bd, cand, med):
            # the plausibility test, not the consensus, decided: the block keeps the
            # confidence of the chosen peak's own SNR, scaled by the test's margin
            ext, med_b, snr, ok = by_block[id(bd)]
            if not ok or ext[0][2] <= med_b:
                return 1e-3
            snr_c = snr * (cand[2] - med_b) / (ext[0][2] - med_b)
            return max(min(max((snr_c - snr_min) / snr_scale, 0.0), 1.0) * factor, 1e-3)

        lists = [(ext, ext, med) for ext, med, _, _ in phys_all]
        sx, sy = fit(lists, np.asarray(centre, float), conf_of)
    if note:
        reg.notes.append(note)
        logger.info("register: %s", note)
    inl = np.array([bd.record.used for bd in blocks], bool)

    n_used = int(inl.sum())
    desc = (f"measured shift ({sx:+.3f}, {sy:+.3f}) m from {n_used} of {len(records)} blocks, "
            f"confidence {reg.confidence:.2f}")
    if reg.confidence < float(cfg["min_confidence"]):
        return _finish_weak(reg, cfg, f"weak fit: {desc}")
    if math.hypot(sx, sy) < float(cfg["min_shift_m"]):
        reg.applied = False
        reg.shift_m = (0.0, 0.0)
        reg.message = f"{desc}; below min_shift_m = {cfg['min_shift_m']} m, not applied"
        logger.info("register: %s", reg.message)
        return reg
    reg.applied = True
    reg.shift_m = (float(sx), float(sy))
    reg.message = f"{desc}; applied" + (" (following drift)" if reg.follow_drift and reg.model else "")
    logger.info("register: %s", reg.message)
    return reg


def _finish_weak(reg: Registration, cfg: Mapping, why: str) -> Registration:
    if cfg["require"]:
        raise RegistrationError(f"[register] require = true: {why}")
    apply = bool(cfg["apply_weak"]) and all(math.isfinite(v) for v in reg.measured_m)
    if apply and math.hypot(*reg.measured_m) >= float(cfg["min_shift_m"]):
        reg.applied = True
        reg.shift_m = (float(reg.measured_m[0]), float(reg.measured_m[1]))
        reg.message = f"{why}; applied anyway (apply_weak = true)"
    else:
        reg.applied = False
        reg.shift_m = (0.0, 0.0)
        reg.message = f"{why}; layout used as drawn"
    warnings.warn(f"layout registration: {reg.message}", RegistrationWarning, stacklevel=3)
    logger.info("register: %s", reg.message)
    return reg


def apply_shift(modules: geopandas.GeoDataFrame,
                shift: Registration | tuple[float, float]) -> geopandas.GeoDataFrame:
    """A copy of ``modules`` with footprints and frame origins translated.

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        Modules with ``geometry`` and optionally the frame columns ``fx0``, ``fy0``.
    shift : Registration or (float, float)
        A :class:`Registration` (each module moves by its shift field at the module's
        centre; nothing moves when it was not applied) or a plain ``(dx, dy)`` [m].

    Returns
    -------
    geopandas.GeoDataFrame
        The input is not modified; the frame vectors (``fux`` ...) are unchanged.
    """
    import shapely

    out = modules.copy()
    n = len(out)
    if n == 0:
        return out
    geoms = np.asarray(out.geometry.values, dtype=object)
    if isinstance(shift, Registration):
        c = shapely.centroid(geoms)
        cx, cy = shapely.get_x(c), shapely.get_y(c)
        ok = np.isfinite(cx) & np.isfinite(cy)
        cx = np.where(ok, cx, 0.0)
        cy = np.where(ok, cy, 0.0)
        dx, dy = shift.shift_at(cx, cy)
        dx = np.asarray(dx, float).reshape(n)
        dy = np.asarray(dy, float).reshape(n)
    else:
        sx, sy = (float(v) for v in shift)
        dx = np.full(n, sx)
        dy = np.full(n, sy)
    if not (np.any(dx) or np.any(dy)):
        return out
    coords, idx = shapely.get_coordinates(geoms, return_index=True)
    coords = coords + np.column_stack([dx[idx], dy[idx]])
    moved = shapely.set_coordinates(geoms.copy(), coords)
    import geopandas

    out[out.geometry.name] = geopandas.GeoSeries(moved, index=out.index, crs=modules.crs)
    for col, d in (("fx0", dx), ("fy0", dy)):
        if col in out.columns:
            out[col] = out[col].to_numpy(dtype=float) + d
    return out


def align_flight(flight: Any, settings: Mapping | None = None, out_path: Any = None, *,
                 overwrite: bool = False, progress: ProgressFn | None = None
                 ) -> tuple[Registration, geopandas.GeoDataFrame]:
    """Register a flight's layout to its orthomosaic and optionally write the moved layout.

    Parameters
    ----------
    flight : Flight
        From :func:`pvscan.io.manifest.load_flight`.
    settings : Pipeline or mapping, optional
        A pipeline (its ``[register]`` section is used) or the section itself.
    out_path : path-like, optional
        GeoPackage to write: the module footprints moved onto the ortho, with all module
        properties, in the ortho's CRS (layer ``modules``). Written to a temporary sibling
        and renamed into place, so it is either absent or complete.
    overwrite : bool
        Replace an existing ``out_path``.
    progress : callable, optional

    Returns
    -------
    (Registration, geopandas.GeoDataFrame)
        The registration and the moved modules.

    Raises
    ------
    OutputError
        ``out_path`` exists without ``overwrite``, or cannot be written.
    """
    from pathlib import Path

    from pvscan.errors import OutputError
    from pvscan.io.layout import read_layout
    from pvscan.io.ortho import open_orthos

    if out_path is not None:
        out_path = Path(out_path)
        if out_path.suffix.lower() != ".gpkg":
            raise OutputError(f"{out_path}: the corrected layout is written as GeoPackage; use a .gpkg name")
        if out_path.exists() and not overwrite:
            raise OutputError(f"{out_path}: exists (use --overwrite to replace it)")
        if not out_path.parent.is_dir():
            raise OutputError(f"{out_path}: folder {out_path.parent} does not exist")
    with open_orthos(flight.flight.orthos, flight.ortho) as orthos:
        modules = read_layout(flight, orthos.crs)
        reg = estimate_shift(orthos, modules, settings, progress=progress, flight=flight)
    moved = apply_shift(modules, reg)
    if out_path is not None:
        from pvscan.io.outputs import atomic_path

        with atomic_path(out_path, suffix=".tmp.gpkg") as tmp:
            moved.reset_index(drop=True).to_file(tmp, layer="modules", driver="GPKG", engine="pyogrio")
    return reg, moved
