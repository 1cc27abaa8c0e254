"""What the camera and the mosaic do to geometry and level: relief displacement, vignetting,
misaligned frames.

An orthomosaic keeps, for each ground point, the frame whose centre is nearest (the one that
sees it most squarely; :meth:`pvscan.simulate.flightpath.FlightPlan.imaged_at` uses the same
rule). The camera looks straight down from ``H`` metres above the ground at that frame's
nadir point ``N``.

**Relief displacement.** An ortho rectified on a ground-level surface model puts every ray
where it meets the ground. A point at height ``h`` above the ground and at horizontal
distance ``r`` from the nadir therefore lands at ``r' = r * H / (H - h)``: displaced
radially away from the nadir by ``d = r' * h / H`` (the photogrammetry textbook relation
``d = r h / H``, ``r`` measured to the displaced image point; e.g. Wolf, Dewitt & Wilkinson,
*Elements of Photogrammetry*, chapter on vertical photographs). Seen from the other side,
ortho pixel ``P`` shows the surface point ``Q = P - (P - N) * h(Q) / H``, found here by a
short fixed-point iteration on the table height ``h(Q)``. ``ortho.relief_height_fraction``
is the share of the table height the ortho's surface model misses: 1 for an ortho built on
a ground-level model, 0 for a true ortho (the default), between for a smoothed surface
model. Where neighbouring frames meet, the displacement jumps: edges are doubled or cut.

**Vignetting.** The irradiance on the focal plane falls off as ``cos^4(theta)`` with the
angle ``theta`` off the optical axis (the cosine-fourth law of radiometric optics);
radiometric calibration removes most of it. ``camera.vignetting`` is the share left:
the sensor radiance is multiplied by ``1 - vignetting * (1 - cos^4 theta)``, with
``tan theta = r / H`` for a nadir camera.

**Motion blur.** A microbolometer's pixel answers a change of the scene like a first-order
low-pass with the detector's thermal time constant ``tau`` (common practice: 7-15 ms for
uncooled microbolometers). Flying at ``v`` along the unit vector ``d``, the pixel imaging
ground point ``g`` at time ``t`` imaged ``g - s d`` at ``t - s / v``, so the image is the scene
convolved with a one-sided exponential trail behind the motion: ``(1 / L) exp(-s / L)``,
``s >= 0``, of length ``L = v tau`` (:func:`motion_kernel`); the lens's Gaussian
point-spread function acts on the same band radiance, so an edge across the track spreads as
the exponentially modified Gaussian.

**Misaligned frames.** A seam rectangle (``distractors.seams``) may also be shifted by a
few centimetres (``distractors.seam_shift_m``): inside it the mosaic shows the scene
``shift`` metres away, so edges crossing the seam's border are doubled or cut.
"""
from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from pvscan._typing import FloatArray, IntArray

#: ``height(x, y)``: height above the ground at map points [m].
HeightFn = Callable[[FloatArray, FloatArray], FloatArray]

__all__ = ["FrameLookup", "motion_kernel", "relief_image", "relief_source", "smear", "vignetting_factor"]


class FrameLookup:
    """Nadir point of the frame an ortho pixel comes from (nearest frame centre).

    Parameters
    ----------
    centres : ndarray (n, 2)
        Frame centres (nadir points) in the projected CRS [m].
    """

    def __init__(self, centres: ArrayLike) -> None:
        self.centres = np.asarray(centres, float)
        self._tree = cKDTree(self.centres)

    def nadir(self, x: ArrayLike, y: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Nadir (x, y) of the frame kept for each point [m]."""
        x = np.asarray(x, float)
        _, k = self._tree.query(np.stack([x.ravel(), np.asarray(y, float).ravel()], axis=1))
        c = self.centres[k]
        return c[:, 0].reshape(x.shape), c[:, 1].reshape(x.shape)

    def index(self, x: ArrayLike, y: ArrayLike) -> IntArray:
        """Index of the frame kept for each point [-]."""
        x = np.asarray(x, float)
        _, k = self._tree.query(np.stack([x.ravel(), np.asarray(y, float).ravel()], axis=1))
        return k.reshape(x.shape)


def relief_source(px: ArrayLike, py: ArrayLike, nx: FloatArray, ny: FloatArray, height: HeightFn,
                  altitude_m: FloatArray | float, starts: Sequence[float] = (1.0,), n_iter: int = 4,
                  tol_m: float = 0.02) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Surface point shown by ortho pixels under relief displacement [m].

    Parameters
    ----------
    px, py : ndarray
        Ortho pixel centres (ground level) [m].
    nx, ny : ndarray
        Nadir of the frame each pixel comes from [m].
    height : callable
        ``height(x, y)`` -> height above the ground of the surface the ortho's model misses
        (0 off raised objects) [m].
    altitude_m : float
        Camera height above the ground [m].
    starts : sequence of float
        Heights to start the fixed-point search from, highest first (the highest surface a
        ray meets hides what lies below it) [m].

    Returns
    -------
    qx, qy : ndarray
        The surface point seen (``Q = P - (P - N) * h(Q) / H``; ``P`` itself where the ray
        meets no raised surface) [m].
    h : ndarray
        Its height [m] (0 where the pixel sees the ground).
    """
    px = np.asarray(px, float)
    py = np.asarray(py, float)
    ex, ey = (px - nx) / altitude_m, (py - ny) / altitude_m
    found = np.zeros(px.shape, bool)
    out = np.zeros(px.shape)
    for h0 in starts:
        alive = ~found
        if not alive.any():
            break
        h = np.full(px.shape, float(h0))
        for _ in range(n_iter):
            hq = height(px - ex * h, py - ey * h)
            alive &= hq > 0
            h = np.where(alive, hq, h)
        hq = height(px - ex * h, py - ey * h)
        conv = alive & (np.abs(hq - h) < tol_m)
        out[conv] = h[conv]
        found |= conv
    return px - ex * out, py - ey * out, out


def relief_image(qx: ArrayLike, qy: ArrayLike, height: ArrayLike, altitude_m: ArrayLike, lookup: FrameLookup,
                 n_iter: int = 4) -> tuple[FloatArray, FloatArray]:
    """Where surface points at ``height`` above the ground land in the ortho [m].

    The inverse of :func:`relief_source`: ``P = N + (Q - N) * H / (H - h)``, with ``N`` the
    nadir of the frame the ortho keeps at ``P`` (found by a few fixed-point steps from the
    frame nearest ``Q``; at a frame border the point may land in either frame, as an edge
    of the ortho is doubled or cut there).

    Parameters
    ----------
    qx, qy : ndarray
        Surface points (their map position) [m].
    height : ndarray or float
        Their height above the ground that the ortho's surface model misses [m].
    altitude_m : ndarray or float
        Camera height above the ground there [m].
    lookup : FrameLookup
        The frames' nadir points.

    Returns
    -------
    px, py : ndarray
        The ortho positions [m].
    """
    qx = np.asarray(qx, float)
    qy = np.asarray(qy, float)
    k = np.asarray(altitude_m, float) / (np.asarray(altitude_m, float) - np.asarray(height, float))
    px, py = qx, qy
    for _ in range(n_iter):
        nx, ny = lookup.nadir(px, py)
        px, py = nx + (qx - nx) * k, ny + (qy - ny) * k
    return px, py


def motion_kernel(length_px: float, direction: Sequence[float] | FloatArray, step_px: float = 0.05,
                  reach: float = 7.0) -> FloatArray:
    """Raster kernel of the exponential trail of motion blur, normalised to sum 1.

    Parameters
    ----------
    length_px : float
        Trail length ``L = v tau / GSD`` [px].
    direction : (float, float)
        Unit vector (east, north) of the travel; the trail points the other way.
    step_px : float
        Sampling step along the trail (each sample spread bilinearly on the raster) [px].
    reach : float
        The trail is cut at ``reach * L`` (``exp(-7)``: 0.1 % of the weight) [-].

    Returns
    -------
    ndarray (2 r + 1, 2 r + 1)
        Convolution kernel centred on the middle pixel (rows run south, columns east).
    """
    ln = float(length_px)
    if ln <= 0:
        return np.ones((1, 1))
    r = int(np.ceil(reach * ln)) + 1
    k = np.zeros((2 * r + 1, 2 * r + 1))
    s = (np.arange(int(np.ceil(reach * ln / step_px))) + 0.5) * step_px
    w = np.exp(-s / ln)  # weight of each sample of the trail (the step is constant)
    dx, dy = float(direction[0]), float(direction[1])
    # a convolution kernel: out(g) = sum k(j) in(g - j), so the trail's samples sit at
    # j = +s d (the scene at g - s d); rows grow southwards
    col = r + s * dx
    row = r - s * dy
    c0, r0 = np.floor(col).astype(int), np.floor(row).astype(int)
    fc, fr = col - c0, row - r0
    for ddr, ddc, ww in ((0, 0, (1 - fr) * (1 - fc)), (0, 1, (1 - fr) * fc), (1, 0, fr * (1 - fc)), (1, 1, fr * fc)):
        np.add.at(k, (r0 + ddr, c0 + ddc), w * ww)
    return k / k.sum()


def smear(image: FloatArray, length_px: float, direction: Sequence[float] | FloatArray) -> FloatArray:
    """``image`` convolved with :func:`motion_kernel` (FFT; edges: nearest value repeated)."""
    from scipy.signal import fftconvolve

    if length_px <= 0:
        return image
    k = motion_kernel(length_px, direction)
    r = k.shape[0] // 2
    out = fftconvolve(np.pad(image, r, mode="edge"), k, mode="same")
    return out[r:r + image.shape[0], r:r + image.shape[1]]


def vignetting_factor(r_m: ArrayLike, altitude_m: float, residual: float) -> FloatArray:
    """Sensor radiance factor of residual vignetting at ground distance ``r_m`` from the nadir [-].

    ``1 - residual * (1 - cos^4 theta)``, ``tan theta = r / H`` (cosine-fourth law).
    """
    r = np.asarray(r_m, float)
    cos2 = altitude_m ** 2 / (altitude_m ** 2 + r ** 2)
    return 1.0 - residual * (1.0 - cos2 ** 2)
