"""Blocks of the ortho: settings, windowed reduced reads, footprint masks, block spectra, fit helpers."""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.fft
from affine import Affine
from rasterio import features
from rasterio.windows import Window
from scipy import ndimage

from pvscan.measure.register._records import BlockShift
from pvscan.measure.register.correlate import _peaks, _search_region, cross_power, upsampled_peak

logger = logging.getLogger(__name__)





# --------------------------------------------------------------------------------------
# helpers on blocks
# --------------------------------------------------------------------------------------
def _settings(settings: Mapping[str, Any] | None) -> dict[str, Any]:
    """The ``[register]`` section: the keys given over the defaults of the pipeline file."""
    from pvscan.errors import PipelineError
    from pvscan.io.resources import describe_error, load_schema, schema_errors
    from pvscan.io.settings import section

    out = dict(section(settings, "register"))
    plain = {k: (list(v) if isinstance(v, tuple) else v) for k, v in out.items()}
    errs = schema_errors(plain, load_schema("pipeline/register.schema.json"))
    if errs:
        raise PipelineError(f"[register] settings: {describe_error(errs[0], prefix='register.')}")
    return out


def _nan_reduce(a: np.ndarray, f: int) -> np.ndarray:
    """Block mean over f x f pixels ignoring NaN (NaN where a block has no valid pixel)."""
    if f == 1:
        return a.astype(np.float64)
    h, w = a.shape[0] // f, a.shape[1] // f
    a = a[: h * f, : w * f]
    valid = np.isfinite(a)
    z = np.where(valid, a, a.dtype.type(0))
    # one strided add per position in the block (a reduction over two strided axes is
    # several times slower); float32 pixels sum exactly in float64
    s = np.zeros((h, w))
    c = np.zeros((h, w), np.int64)
    for i in range(f):
        for j in range(f):
            s += z[i::f, j::f]
            c += valid[i::f, j::f]
    out = np.full((h, w), np.nan)
    np.divide(s, c, out=out, where=c > 0)
    return out


def _as_mappings(geoms: Any) -> list[Any]:
    """GeoJSON-like mappings of the footprints for ``rasterio.features.rasterize``, built
    vectorised: every simple polygon in one MultiPolygon mapping (rasterize hands each of its
    polygons to GDAL as a polygon of its own, so the burn is the same as one shape per
    footprint, without a Python validity check and a ``__geo_interface__`` per footprint),
    the other geometries (holes, several parts) as they are."""
    import shapely

    geoms = np.asarray(geoms, dtype=object)
    simple = ((shapely.get_type_id(geoms) == 3) & (shapely.get_num_interior_rings(geoms) == 0)
              & ~shapely.is_empty(geoms))
    out: list = list(geoms[~simple])
    if simple.any():
        rings = shapely.get_exterior_ring(geoms[simple])
        coords, which = shapely.get_coordinates(rings, return_index=True)
        bounds = np.searchsorted(which, np.arange(len(rings) + 1)).tolist()
        flat = coords.tolist()
        out.append({"type": "MultiPolygon",
                    "coordinates": [[flat[b0:b1]] for b0, b1 in zip(bounds[:-1], bounds[1:])]})
    return out


def _coverage(geoms: Any, shape: tuple[int, int], transform: Affine, ss: int) -> np.ndarray:
    """Fraction of each pixel covered by the footprints (ss x ss samples per pixel)."""
    h, w = shape
    if not len(geoms):
        return np.zeros(shape)
    fine = features.rasterize(((g, 1) for g in _as_mappings(geoms)), out_shape=(h * ss, w * ss),
                              transform=transform @ Affine.scale(1.0 / ss), fill=0, dtype="uint8")
    # the samples of each pixel summed in integers (exact in any order): first the ss rows of
    # samples (contiguous rows, in the narrowest type that holds ss * ss), then the ss columns
    rows = fine[0::ss].astype(np.uint8 if ss * ss <= 255 else np.uint16)
    for i in range(1, ss):
        rows += fine[i::ss]
    cols = rows.reshape(h, w, ss)
    counts = cols[:, :, 0].astype(np.uint16)
    for j in range(1, ss):
        counts += cols[:, :, j]
    return counts * (1.0 / (ss * ss))


def _taper(shape: tuple[int, int], width_px: float) -> np.ndarray:
    def one(n: int) -> np.ndarray:
        w = np.ones(n)
        k = int(min(max(width_px, 1), n // 2))
        if k > 0:
            ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(k) + 0.5) / k)
            w[:k] = ramp
            w[n - k:] = ramp[::-1]
        return w

    return one(shape[0])[:, None] * one(shape[1])[None, :]


def _fast_shape(shape: tuple[int, int]) -> tuple[int, int]:
    return tuple(scipy.fft.next_fast_len(int(s), real=False) for s in shape)


def _pad(a: np.ndarray, shape: tuple[int, int], dtype: Any = np.float64) -> np.ndarray:
    out = np.zeros(shape, dtype)
    out[: a.shape[0], : a.shape[1]] = a
    return out


def _tile_attr(tile: Any, name: str, default: Any = None) -> Any:
    return getattr(tile, name, default) if not isinstance(tile, Mapping) else tile.get(name, default)


def _tile_gsd(tile: Any) -> float:
    g = _tile_attr(tile, "gsd_m")
    if g:
        return float(g)
    t = _tile_attr(tile, "transform")
    return float(math.sqrt(abs(t.a * t.e - t.b * t.d)))


def _read_reduced(orthos: Any, tile_index: int, window: Window, f: int, stripe_px: int = 1024) -> np.ndarray:
    """Read a window in stripes and reduce by f x f (memory bounded by a stripe)."""
    h, w = int(window.height), int(window.width)
    step = max(f, (stripe_px // f) * f)
    parts = []
    for r0 in range(0, h, step):
        rh = min(step, h - r0)
        win = Window(window.col_off, window.row_off + r0, w, rh)
        arr = np.asarray(orthos.read(tile_index, win))
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
    record: BlockShift = field(default_factory=lambda: BlockShift(math.nan, math.nan, math.nan, math.nan, 0.0))


_MAX_CANDIDATES = 6


def _analyse_block(bd: _BlockData, spec: np.ndarray, cfg: Mapping[str, Any], signs: tuple[float, ...]) -> None:
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


def _prepare_block(orthos: Any, ti: int, tile: Any, win: Window, mod_geoms: Any, cfg: Mapping[str, Any], f: int,
                   work_gsd: float) -> tuple[_BlockData | None, str]:
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
        # pixels near nodata (none without nodata: the dilation of nothing is nothing)
        ok = valid.copy() if valid.all() else ~ndimage.binary_dilation(~valid, iterations=int(math.ceil(3 * gs)) + 1)
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
    # padded straight into the transforms' precision (the same values as a cast afterwards)
    spec = cross_power(_pad(z, shape, np.float32), _pad(zm, shape, np.float32), float(cfg["whitening"]),
                       float(cfg["highpass_sigma_m"]) / work_gsd, dtype=np.float32)
    lin = np.array([[wt.a, wt.b], [wt.d, wt.e]])
    cx, cy = wt @ (w / 2.0, h / 2.0)
    signs = (1.0,) if cfg["feature"] == "gradient" else (1.0, -1.0)
    bd = _BlockData(ti, float(cx), float(cy), lin, float(cfg["max_shift_m"]) / work_gsd)
    # the peak refinement is a (41 x M) @ (M x N) complex product per candidate: on one BLAS
    # thread it takes about a sixth of the CPU time of a threaded product on two busy cores
    # (the threads spin), and the figures do not depend on the thread count
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        _analyse_block(bd, spec, cfg, signs)
    return bd, ""


def _block_windows(tile: Any, geoms_bounds: tuple[float, float, float, float],
                   cfg: Mapping[str, Any]) -> list[Window]:
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


def _fit_similarity(x: np.ndarray, y: np.ndarray, dx: np.ndarray, dy: np.ndarray,
                    w: np.ndarray) -> tuple[float, float, float, float, float, float]:
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


def _weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    o = np.argsort(v)
    cw = np.cumsum(w[o])
    return float(v[o][np.searchsorted(cw, 0.5 * cw[-1])])


def _spread_enough(x: np.ndarray, y: np.ndarray, min_extent: float) -> bool:
    if len(x) < 3:
        return False
    pts = np.column_stack([x - x.mean(), y - y.mean()])
    sv = np.linalg.svd(pts, compute_uv=False)
    return sv[-1] / math.sqrt(len(x)) > min_extent



# --------------------------------------------------------------------------------------
# physical plausibility of a candidate shift
# --------------------------------------------------------------------------------------
