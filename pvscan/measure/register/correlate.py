"""Phase correlation core: pure array functions (Kuglin and Hines 1975; Guizar-Sicairos et al. 2008)."""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.fft
from scipy import ndimage

logger = logging.getLogger(__name__)


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
                highpass_sigma_px: float = 0.0, dtype: Any = np.float64) -> np.ndarray:
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
        r *= _highpass_squared(r.shape, float(highpass_sigma_px), np.dtype(dtype))
    if whitening > 0:
        mag = np.abs(r)
        floor = max(float(mag.max()) * 1e-9, float(np.finfo(mag.dtype).tiny))
        r /= np.maximum(mag, floor) ** np.asarray(whitening, mag.dtype)
    return r


def _highpass_squared(shape: tuple[int, ...], sigma_px: float, dtype: np.dtype) -> np.ndarray:
    """``h * h`` of the high-pass ``h = 1 - exp(-2 pi^2 sigma^2 f^2)`` on the FFT grid of ``shape``
    (``f^2`` from ``numpy.fft.fftfreq`` along both axes), as ``dtype``.

    The frequencies of index ``i`` and ``m - i`` differ in sign only, so their squares are the
    same numbers: ``h`` is computed once per distinct ``|f|`` (a quarter of the grid) and
    spread by index, the very values of the whole grid computed element by element.
    """
    m, n = (int(v) for v in shape)
    fr, fc = np.abs(np.fft.fftfreq(m)), np.abs(np.fft.fftfreq(n))
    ir = np.minimum(np.arange(m), m - np.arange(m))  # index of the same |f|, in 0 .. m // 2
    ic = np.minimum(np.arange(n), n - np.arange(n))
    f2 = fr[:m // 2 + 1, None] ** 2 + fc[None, :n // 2 + 1] ** 2
    h = -np.expm1(-2.0 * np.pi ** 2 * sigma_px ** 2 * f2)
    return np.take((h * h).astype(dtype), ic, axis=1)[ir]


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


def _peaks(region: np.ndarray, r: int, exclusion_px: float, ratio: float, near_zero: bool = False
           ) -> tuple[tuple[int, int], float, float, float, list[tuple[int, int, float]]]:
    """Best peak, its statistics and all candidates >= ratio * best (integer offsets).

    With ``near_zero`` the local maximum nearest to the zero shift (within
    ``exclusion_px``) is kept too, whatever its height (the layout as drawn is always a
    hypothesis)."""
    finite = np.isfinite(region)
    vals = region[finite]
    best_i = int(np.argmax(np.where(finite, region, -np.inf)))
    bi, bj = (int(v) for v in np.unravel_index(best_i, region.shape))
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
