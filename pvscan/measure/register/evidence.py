"""Module-level evidence of where the layout sits on the ortho.

The correlation of :mod:`pvscan.measure.register.estimate` proposes where the layout
belongs; this module *judges* a proposal on what the image shows inside the module
footprints, the place the measurements will be taken.

Sunlit glass is the most uniform surface of a PV plant at the scale of a module: inside
one module the temperature varies by a few tenths of a kelvin from cell to cell, while the
module's outline is marked: the aluminium frame and the gap to the next module are cooler
lines, the table edge meets ground or shadow. A footprint that is off its module takes in
some of those lines (its inside spreads) and its outline falls where the image has no line
(its outline contrast drops). The evidence of one footprint is therefore

    ratio = spread of the pixels inside (inset) / |mean of the outline band - mean inside|

(lower is better, whatever the sign of the contrast), and a footprint whose mean is far
from the median footprint's reads no glass (ground at a table end, in the gap between
tables: where a placement one module pitch off along a row puts some footprints) and counts
as featureless (ratio 1). The evidence of a placement is the mean over a sample of modules.
Smooth ground or a shadow as warm as the glass has a low spread but no outline at the
footprint's edge; a placement one pitch off along a row is told by the table ends.

This uses only the module's own structure: frame lines and gaps (along and across the
rows) and table edges. A shadow that is as warm as the glass shows no contrast at all and
cannot pull a footprint; a footprint shifted toward the shadowed side of a table is
penalised less than one shifted toward the sunlit side, which is why the quality test
(:func:`placement_quality`) weights its probes by the sun's side (pvlib's solar
position from the flight's time and place).

A placement is a similarity transform of the layout about a centre ``c``:
``p' = c + s R(theta) (p - c) + t``, plus optional per-module translations (local
refinement). The pixels are sampled once (one windowed read per sampled module, at the
ortho's resolution or reduced by an integer factor), so each evaluation is a few
vectorised array operations.
"""
from __future__ import annotations

import contextlib
import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from rasterio.windows import Window

from pvscan.measure.register._chunks import window_corners
from pvscan.measure.register._glass import _glass_mode, _glass_modes, neighbourhoods
from pvscan.robust import numpy_nanmedian_rows

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

logger = logging.getLogger(__name__)

__all__ = ["Placement", "ModuleSample", "sample_modules", "module_spread", "evidence", "placement_quality",
           "sun_vector"]


@dataclass(frozen=True)
class Placement:
    """A similarity transform of the layout: ``p' = c + s R(theta) (p - c) + t``.

    Attributes
    ----------
    tx, ty : float
        Translation, east and north [m].
    theta_deg : float
        Rotation, counter-clockwise on the map [deg].
    scale : float
        Scale [-] (1 = none).
    cx, cy : float
        Centre of rotation and scale (the layout's centre) [m].
    tables, rows : tuple
        Translations ``(table_id, dx, dy)`` of single tables after the similarity, then
        ``(table_id, table_row, dx, dy)`` of single rows of tables (local refinement) [m].
    """

    tx: float = 0.0
    ty: float = 0.0
    theta_deg: float = 0.0
    scale: float = 1.0
    cx: float = 0.0
    cy: float = 0.0
    tables: tuple = ()
    rows: tuple = ()

    @property
    def matrix(self) -> np.ndarray:
        """The 2 x 2 linear part ``s R(theta)``."""
        t = math.radians(self.theta_deg)
        c, s = math.cos(t) * self.scale, math.sin(t) * self.scale
        return np.array([[c, -s], [s, c]])

    def apply(self, x: Any, y: Any) -> tuple[np.ndarray, np.ndarray]:
        """Transformed map points [m]."""
        m = self.matrix
        x = np.asarray(x, float) - self.cx
        y = np.asarray(y, float) - self.cy
        return (self.cx + m[0, 0] * x + m[0, 1] * y + self.tx, self.cy + m[1, 0] * x + m[1, 1] * y + self.ty)

    def displacement_max(self, bounds: Any) -> float:
        """Largest displacement of the corners of ``bounds`` (minx, miny, maxx, maxy) [m]."""
        xs = np.array([bounds[0], bounds[2], bounds[2], bounds[0]], float)
        ys = np.array([bounds[1], bounds[1], bounds[3], bounds[3]], float)
        px, py = self.apply(xs, ys)
        return float(np.max(np.hypot(px - xs, py - ys)))

    def moved(self, **kw: float) -> Placement:
        """A copy with some fields replaced."""
        d = {k: getattr(self, k) for k in ("tx", "ty", "theta_deg", "scale", "cx", "cy")}
        d.update(kw)
        return Placement(**d)

    def is_identity(self) -> bool:
        return (self.tx == 0.0 and self.ty == 0.0 and self.theta_deg == 0.0 and self.scale == 1.0
                and not self.tables and not self.rows)

    def shift_model(self) -> tuple[float, float, float, float, float, float]:
        """The shift field ``(tx, ty, a, b, x0, y0)`` of :class:`Registration` (shift at
        ``(x, y)`` = ``(tx + a dx - b dy, ty + b dx + a dy)``, ``d = (x, y) - (x0, y0)``)."""
        m = self.matrix
        return (self.tx, self.ty, float(m[0, 0] - 1.0), float(m[1, 0]), self.cx, self.cy)

    def to_dict(self) -> dict:
        return {"shift_m": [round(self.tx, 4), round(self.ty, 4)], "rotation_deg": round(self.theta_deg, 5),
                "scale": round(self.scale, 7), "centre": [round(self.cx, 3), round(self.cy, 3)]}


def _inverse(p: Placement) -> Placement:
    """The placement undoing ``p`` (same centre)."""
    m = np.linalg.inv(p.matrix)
    t = -m @ np.array([p.tx, p.ty])
    return Placement(float(t[0]), float(t[1]), -p.theta_deg, 1.0 / p.scale, p.cx, p.cy)


def _compose(outer: Placement, inner: Placement) -> Placement:
    """``inner`` after ``outer`` (both about the same centre): one placement."""
    m = inner.matrix @ outer.matrix
    t = inner.matrix @ np.array([outer.tx, outer.ty]) + np.array([inner.tx, inner.ty])
    th = math.degrees(math.atan2(m[1, 0], m[0, 0]))
    return Placement(float(t[0]), float(t[1]), th, float(math.hypot(m[0, 0], m[1, 0])), outer.cx, outer.cy)


@dataclass
class ModuleSample:
    """Pixels around a sample of modules, read once.

    Attributes
    ----------
    index : numpy.ndarray
        Row of each sampled module in the modules frame (k,).
    values : numpy.ndarray
        (k, S, S) float32 apparent temperature [degC], each module's window centred on
        the module's drawn centre, NaN where invalid or outside the ortho. Given without
        ``centred``, it is centred in place (minus ``ref``) and ``centred`` is the same array:
        one copy of the pixels, not two.
    x0, y0 : numpy.ndarray
        Map coordinates of the centre of pixel (0, 0) of each window [m].
    gx, gy : float
        Pixel step along columns (east) and rows (usually negative: north-up) [m].
    frames : numpy.ndarray
        (k, 6) module frames ``fx0, fy0, fux, fuy, fvx, fvy`` as drawn [m].
    table : numpy.ndarray
        Table id of each sampled module (k,).
    """

    index: np.ndarray
    values: np.ndarray
    x0: np.ndarray
    y0: np.ndarray
    gx: float
    gy: float
    frames: np.ndarray
    table: np.ndarray = field(default_factory=lambda: np.zeros(0, object))
    centred: np.ndarray | None = None
    ref: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        # values minus each window's median (float32), so the spread sums stay exact
        k = len(self.index)
        if self.centred is None and k:
            flat = self.values.reshape(k, -1)
            if flat.dtype in (np.float32, np.float64):
                # numpy.nanmedian's numbers by one sort, 1,024 windows at a time (the sorted
                # copy stays a few MB)
                ref = np.concatenate([numpy_nanmedian_rows(flat[lo:lo + 1024]) for lo in range(0, k, 1024)])
            else:
                with _quiet():
                    ref = np.nanmedian(flat, axis=1)
            ref = np.where(np.isfinite(ref), ref, 0.0).astype(np.float32)
            self.values -= ref[:, None, None]
            self.centred = self.values
            self.ref = ref.astype(np.float64)

    def __len__(self) -> int:
        return len(self.index)

    def near(self, radius_m: float, neighbours: int) -> np.ndarray | None:
        """:func:`~pvscan.measure.register._glass.neighbourhoods` of the sampled modules (cached)."""
        cache = self.__dict__.setdefault("_near", {})
        key = (float(radius_m), int(neighbours))
        if key not in cache:
            cache[key] = neighbourhoods(self.frames, *key)
        return cache[key]


def _frames(modules: gpd.GeoDataFrame) -> np.ndarray:
    cols = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]
    if all(c in modules.columns for c in cols):
        return modules[cols].to_numpy(dtype=float)
    raise KeyError("modules need the frame columns fx0, fy0, fux, fuy, fvx, fvy")


def sample_modules(orthos: Any, modules: gpd.GeoDataFrame, *, n: int, margin_m: float, reduce: int = 1,
                   seed: int = 0) -> ModuleSample:
    """Read the pixels around up to ``n`` modules spread over the site.

    Modules are taken in a spatially even order (a shuffled grid of the site cut into about
    ``n`` cells, one module per cell; deterministic for a ``seed``). Each is read as one
    square window centred on its drawn centre, large enough for the module and
    ``margin_m`` around it, and reduced by ``reduce`` x ``reduce`` averaging (NaN-aware).

    Parameters
    ----------
    orthos : OrthoSet
    modules : geopandas.GeoDataFrame
        Modules with frame columns, in the ortho CRS.
    n : int
        Largest number of modules sampled.
    margin_m : float
        Margin read around each module [m]: the largest displacement the sample can judge.
    reduce : int
        Integer reduction factor of the pixels [-].
    seed : int
        Seed of the spatial sampling.
    """
    fr = _frames(modules)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    ok = np.isfinite(cx) & np.isfinite(cy)
    idx_all = np.nonzero(ok)[0]
    if len(idx_all) > n:
        # one module per cell of a grid of about n cells over the site
        x0, x1, y0, y1 = cx[ok].min(), cx[ok].max(), cy[ok].min(), cy[ok].max()
        side = math.sqrt(max((x1 - x0) * (y1 - y0), 1.0) / n)
        key = np.floor((cx[idx_all] - x0) / side).astype(np.int64) * 1_000_003 + np.floor(
            (cy[idx_all] - y0) / side).astype(np.int64)
        rng = np.random.default_rng(seed)
        perm = rng.permutation(len(idx_all))
        _, first = np.unique(key[perm], return_index=True)
        chosen = idx_all[perm[first]]
        if len(chosen) > n:
            chosen = rng.choice(chosen, n, replace=False)
        idx_all = np.sort(chosen)
    tiles = list(orthos.tiles)
    t0 = tiles[0].transform
    gsd = abs(float(t0.a))
    diag = float(np.nanmax(np.hypot(fr[idx_all, 2] + fr[idx_all, 4], fr[idx_all, 3] + fr[idx_all, 5]))) if len(
        idx_all) else 0.0
    side_px = int(math.ceil((diag + 2.0 * margin_m) / (gsd * reduce))) * reduce
    vals = np.full((len(idx_all), side_px // reduce, side_px // reduce), np.nan, np.float32)
    xs0 = np.zeros(len(idx_all))
    ys0 = np.zeros(len(idx_all))
    ti, c0, r0 = window_corners(tiles, cx[idx_all], cy[idx_all], side_px)
    for j in np.unique(ti):
        sel = ti == j
        # the first pixel's centre (the same products as for one point at a time)
        xs0[sel], ys0[sel] = tiles[j].transform @ (c0[sel] + reduce / 2.0, r0[sel] + reduce / 2.0)
    # the windows of neighbouring modules share blocks of the ortho: read through a chunk
    # cache where the ortho set has one (the same pixels as one read per window)
    cache = getattr(orthos, "window_cache", None)
    with cache() if cache is not None else contextlib.nullcontext(orthos.read) as read:
        for k, (j, wc0, wr0) in enumerate(zip(ti.tolist(), c0.tolist(), r0.tolist())):
            a = read(j, Window(wc0, wr0, side_px, side_px)).astype(np.float32, copy=False)
            if reduce > 1:
                a = a.reshape(side_px // reduce, reduce, side_px // reduce, reduce)
                with np.errstate(invalid="ignore"), _quiet():
                    a = np.nanmean(a, axis=(1, 3))
            vals[k] = a
    table = modules["table_id"].to_numpy(dtype=object)[idx_all] if "table_id" in modules.columns else np.zeros(
        len(idx_all), object)
    return ModuleSample(index=idx_all, values=vals, x0=xs0, y0=ys0, gx=float(t0.a) * reduce,
                        gy=float(t0.e) * reduce, frames=fr[idx_all], table=table)


class _quiet:
    def __enter__(self) -> None:
        import warnings

        self._w = warnings.catch_warnings()
        self._w.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc: Any) -> None:
        self._w.__exit__(*exc)


def module_spread(sample: ModuleSample, placement: Placement, *, inset_u: float, inset_v: float,
                  local: np.ndarray | None = None, min_pixels: int = 8, with_mean: bool = False,
                  band_m: float | None = None,
                  off_glass_k: float | None = None,
                  off_glass_near: tuple[float, int] | None = None) -> Any:
    """Spread of the pixels inside each placed footprint: standard deviation [K], or with
    ``band_m`` its ratio to the outline contrast [-] (NaN: too few pixels).

    A pixel is inside when its centre, mapped back to the layout as drawn, has module-local
    coordinates ``u`` in ``[inset_u, 1 - inset_u]`` and ``v`` in ``[inset_v, 1 - inset_v]``.

    Parameters
    ----------
    local : numpy.ndarray, optional
        (k, 2) translations added to each module after the placement [m].
    band_m : float, optional
        When given, the spread is divided by the contrast between the footprint and a band
        of this half-width [m] along its outline (frame, gap, table edge: the module's own
        outline; ground or shadow show no such line at a footprint's edge unless the
        footprint sits on its module), so the result is a ratio [-].
    off_glass_k : float, optional
        With ``band_m``: a footprint whose mean is this far from the median of all the
        footprints' means [K] (ground at a table end, a gap between tables: what a placement
        one module pitch off along a row puts some footprints on) gets the ratio 1, that of
        a featureless placement.
    off_glass_near : (float, int), optional
        ``(radius_m, neighbours)``: the glass a footprint is compared with is that of the
        sampled modules within ``radius_m`` of it (at least its ``neighbours`` nearest, itself
        included) [m, -], not of the whole sample: over a long flight of a large plant the glass
        warms or cools with the sun (2.7 K per 100 m across the rows of a 2 h flight), so the
        glass of one end of the site is not the glass of the other. When every sampled module
        is a neighbour of every other, the same test as without it.
    """
    k = len(sample)
    if k == 0:
        return np.zeros(0)
    # module by module in chunks: the (modules x pixels) temporaries stay bounded on a large
    # sample (each module's figures depend on its own pixels only)
    parts = [_spread_chunk(sample, placement, sl, inset_u=inset_u, inset_v=inset_v, local=local,
                           min_pixels=min_pixels, band_m=band_m)
             for sl in (slice(lo, min(lo + _SPREAD_CHUNK, k)) for lo in range(0, k, _SPREAD_CHUNK))]
    if len(parts) == 1:
        sd, s1, cnt = parts[0]
    else:
        sd, s1, cnt = (np.concatenate([p[j] for p in parts]) for j in range(3))
    if band_m is not None and off_glass_k is not None:
        # absolute means: each window was centred on its own median, which is ground for a
        # module at a table end and glass inside a table
        with np.errstate(invalid="ignore", divide="ignore"):
            m_in = s1 / cnt + sample.ref
        ok_m = np.isfinite(m_in)
        if ok_m.any():
            near = sample.near(*off_glass_near) if off_glass_near is not None else None
            glass = _glass_mode(m_in[ok_m], off_glass_k) if near is None else _glass_modes(m_in, near, off_glass_k)
            off = ok_m & (np.abs(m_in - glass) > off_glass_k)
            sd[off] = 1.0
    if with_mean:
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = s1 / cnt + sample.ref
        mean[cnt < min_pixels] = np.nan
        return sd, mean
    return sd


#: Modules per chunk of :func:`module_spread` (bounds its temporaries: a few MB per array).
_SPREAD_CHUNK = 512


def _spread_chunk(sample: ModuleSample, placement: Placement, sl: slice | np.ndarray, *, inset_u: float, inset_v: float,
                  local: np.ndarray | None, min_pixels: int,
                  band_m: float | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`module_spread` of the modules ``sl`` (a slice or positions in the sample) before
    the off-glass test: the spread (or its ratio to the outline contrast), the sum of the
    centred values inside and their count. ``local`` covers the whole sample."""
    minv = np.linalg.inv(placement.matrix)
    fr = sample.frames[sl]
    ox, oy, ux, uy, vx, vy = (fr[:, j] for j in range(6))
    # layout point of a map point P: q = c + Minv (P - c - t - local)
    tx = placement.tx + (local[sl, 0] if local is not None else 0.0)
    ty = placement.ty + (local[sl, 1] if local is not None else 0.0)
    x0, y0 = sample.x0[sl], sample.y0[sl]
    coef = []
    for ax, ay in ((ux, uy), (vx, vy)):
        n2 = ax * ax + ay * ay
        # coordinate = ((q - o) . a) / |a|^2, q linear in P: coefficient vector Minv^T a
        cxv = (minv[0, 0] * ax + minv[1, 0] * ay) / n2
        cyv = (minv[0, 1] * ax + minv[1, 1] * ay) / n2
        const = ((placement.cx - ox) * ax + (placement.cy - oy) * ay) / n2 - (
            cxv * (placement.cx + tx) + cyv * (placement.cy + ty))
        # coordinate at pixel (row i, column j) of the window: base + a j + b i
        coef.append((cxv * x0 + cyv * y0 + const, cxv * sample.gx, cyv * sample.gy))
    if band_m is not None:
        lu = np.hypot(fr[:, 2], fr[:, 3]) * placement.scale
        lv = np.hypot(fr[:, 4], fr[:, 5]) * placement.scale
        reach_u, reach_v = band_m / lu, band_m / lv
    else:
        reach_u = reach_v = np.zeros(len(fr))
    s = sample.values.shape[1]
    r0, c0, h, w = _crop(coef, np.minimum(inset_u, -reach_u), np.minimum(inset_v, -reach_v), s)
    # the same float32 sums as over the whole window, on the footprint's box (+ its band)
    # only: pixels outside it are in neither the footprint nor its band
    jj = (c0[:, None] + np.arange(w)).astype(np.float32)
    ii = (r0[:, None] + np.arange(h)).astype(np.float32)
    out = []
    for base, a, b in coef:
        out.append(base[:, None, None].astype(np.float32) + a[:, None, None].astype(np.float32)
                   * jj[:, None, :] + b[:, None, None].astype(np.float32) * ii[:, :, None])
    u, v = out
    inside = (u >= inset_u) & (u <= 1.0 - inset_u) & (v >= inset_v) & (v <= 1.0 - inset_v)
    assert sample.centred is not None
    kk = np.arange(len(sample))[sl]
    vals = np.lib.stride_tricks.sliding_window_view(sample.centred, (h, w), axis=(1, 2))[kk, r0, c0]
    finite = np.isfinite(vals)
    if finite.all():
        # no pixel to leave out: the values times the mask are the values selected (a zero
        # outside may carry a sign, which changes no sum)
        d = vals * inside
    else:
        inside &= finite
        d = np.where(inside, vals, np.float32(0.0))
    cnt = inside.sum(axis=(1, 2))
    s1 = d.sum(axis=(1, 2), dtype=np.float64)
    s2 = np.einsum("kij,kij->k", d, d, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = s2 / cnt - (s1 / cnt) ** 2
    sd = np.sqrt(np.maximum(var, 0.0))
    sd[cnt < min_pixels] = np.nan
    if band_m is not None:
        bu = (band_m / lu)[:, None, None].astype(np.float32)
        bv = (band_m / lv)[:, None, None].astype(np.float32)
        in_u = (u >= -bu) & (u <= 1.0 + bu)
        in_v = (v >= -bv) & (v <= 1.0 + bv)
        band = ((((np.abs(u) <= bu) | (np.abs(u - 1.0) <= bu)) & in_v)
                | (((np.abs(v) <= bv) | (np.abs(v - 1.0) <= bv)) & in_u))
        band &= finite
        nb = band.sum(axis=(1, 2))
        sb = np.where(band, vals, np.float32(0.0)).sum(axis=(1, 2), dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            contrast = np.abs(sb / nb - s1 / cnt)
        contrast[nb < min_pixels] = np.nan
        # at most 1, the ratio of a featureless footprint: one module with a hot spot or a
        # reflection (its spread far above any outline contrast) cannot outweigh the others
        sd = np.minimum(sd / np.maximum(contrast, 0.05), 1.0)
    return sd, s1, cnt


def _crop(coef: list, lo_u: np.ndarray, lo_v: np.ndarray, side: int) -> tuple[np.ndarray, np.ndarray, int, int]:
    """One box of rows and columns per module holding every pixel whose module coordinates
    ``(u, v)`` lie in ``[lo_u, 1 - lo_u] x [lo_v, 1 - lo_v]``, of one size for all (the
    largest, within the window of ``side`` pixels): first row, first column, height, width.

    ``coef`` holds per axis ``(base, a, b)``: coordinate = base + a j + b i at pixel (i, j).
    The box is the corners of that parallelogram mapped to pixels, plus two pixels (the
    float32 rounding of the coordinates)."""
    (bu, au, cu), (bv, av, cv) = coef
    det = au * cv - cu * av
    ok = np.abs(det) > 1e-12
    det = np.where(ok, det, 1.0)
    js, iss = [], []
    for u in (lo_u, 1.0 - lo_u):
        for v in (lo_v, 1.0 - lo_v):
            du, dv = u - bu, v - bv
            js.append((cv * du - cu * dv) / det)
            iss.append((au * dv - av * du) / det)
    jmin = np.floor(np.min(js, axis=0)) - 2
    jmax = np.ceil(np.max(js, axis=0)) + 2
    imin = np.floor(np.min(iss, axis=0)) - 2
    imax = np.ceil(np.max(iss, axis=0)) + 2
    fin = ok & np.isfinite(jmin) & np.isfinite(jmax) & np.isfinite(imin) & np.isfinite(imax)
    jmin = np.clip(np.where(fin, jmin, 0), 0, side - 1).astype(np.int64)
    jmax = np.clip(np.where(fin, jmax, side - 1), 0, side - 1).astype(np.int64)
    imin = np.clip(np.where(fin, imin, 0), 0, side - 1).astype(np.int64)
    imax = np.clip(np.where(fin, imax, side - 1), 0, side - 1).astype(np.int64)
    w = int(np.max(jmax - jmin)) + 1 if len(jmin) else 1
    h = int(np.max(imax - imin)) + 1 if len(imin) else 1
    c0 = np.minimum(jmin, side - w)
    r0 = np.minimum(imin, side - h)
    return r0, c0, h, w


def evidence(spread: np.ndarray) -> float:
    """Evidence of a placement from the per-module values: their mean (lower is better)."""
    s = np.asarray(spread, float)
    s = s[np.isfinite(s)]
    return float(np.mean(s)) if len(s) else float("nan")


def sun_vector(lon: float, lat: float, when: Any) -> tuple[float, float, float]:
    """Unit vector toward the sun on the map (east, north) and its elevation [deg].

    pvlib's solar position (NREL SPA) at ``when`` (aware datetime) and (lon, lat) [deg].
    Returns (east, north, elevation_deg); (0, 0, elevation) when the sun is at the zenith.
    """
    import pandas as pd
    import pvlib

    sp = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([pd.Timestamp(when)]), lat, lon)
    az = math.radians(float(sp["azimuth"].iloc[0]))
    el = float(sp["apparent_elevation"].iloc[0])
    return math.sin(az), math.cos(az), el


def _unit_axes(sample: ModuleSample) -> tuple[np.ndarray, np.ndarray]:
    """Median unit vectors of the modules' long (u) and short (v) sides."""
    fr = sample.frames
    u = np.array([np.median(fr[:, 2]), np.median(fr[:, 3])])
    v = np.array([np.median(fr[:, 4]), np.median(fr[:, 5])])
    return u / max(np.hypot(*u), 1e-12), v / max(np.hypot(*v), 1e-12)


def off_glass_near(cfg: Mapping) -> tuple[float, int]:
    """The neighbourhood of the off-glass test (:func:`module_spread`'s ``off_glass_near``):
    ``[register] evidence_off_glass_radius_m`` [m] and ``evidence_off_glass_neighbours`` [-]."""
    return float(cfg["evidence_off_glass_radius_m"]), int(cfg["evidence_off_glass_neighbours"])


def placement_quality(sample: ModuleSample, placement: Placement, cfg: Mapping, *,
                      sun: tuple[float, ...] | None = None, local: np.ndarray | None = None,
                      expected_c: float | None = None) -> dict:
    """How much better the placement is than the same placement moved a little.

    The footprints are moved by ``evidence_probe_m`` both ways along the modules' long side
    and both ways along their short side. Each probe's mean spread inside the footprints is
    compared with the placement's: ``ratio = spread(placement) / spread(probe)`` (low when the footprints sit on their
    modules; near 1 when the image does not show modules where they are placed). The two
    probes of one axis are averaged with weights: a probe moving the footprints away from
    the sun (onto the shadowed side, which may look like glass) counts
    ``evidence_shadow_weight`` of one moving toward it.

    The ratio of means is carried by modules of large spread of their own (a shaded edge, a
    hot cell, glass blurred at a frame seam) that a small move hardly changes; module by
    module, a footprint on its module has its spread lower than at both probes of an axis
    (``minimum_share_u`` / ``_v``: the share of footprints where it is). Either test passed
    on both axes (ratios at most ``evidence_max_ratio``, shares at least
    ``evidence_min_share``) shows the footprints on their modules.

    Uniform ground between rows can look as even as glass; when the apparent temperature of
    sunlit glass at the flight's conditions is known (``expected_c``), the median of the
    footprints' mean values must also lie within ``evidence_glass_max_k`` of it.

    Returns
    -------
    dict
        ``evidence`` (E of the placement) [-], ``spread_k`` (the plain spread inside the
        footprints, the numerator of the probe ratios) [K], ``ratio_u``, ``ratio_v`` [-],
        ``minimum_share_u``, ``minimum_share_v`` [-], ``glass_error_k`` [K] (NaN when
        unknown) and ``ok`` (both ratios at most ``evidence_max_ratio`` or both shares at
        least ``evidence_min_share``, and the glass temperature within its limit when known).
    """
    inset = float(cfg["evidence_inset"])
    sd0, mean0 = module_spread(sample, placement, local=local, with_mean=True, inset_u=inset, inset_v=inset,
                               band_m=float(cfg["evidence_band_m"]), off_glass_k=float(cfg["evidence_off_glass_k"]),
                               off_glass_near=off_glass_near(cfg))
    e0 = evidence(sd0)
    # the probes compare plain spreads: the outline contrast that guides the search (and
    # keeps it off smooth ground) also grows when a footprint slides onto a table edge
    sd_at = module_spread(sample, placement, local=local, inset_u=inset, inset_v=inset)
    sp0 = evidence(sd_at)
    glass = float(np.nanmedian(mean0)) if np.isfinite(mean0).any() else float("nan")
    d = float(cfg["evidence_probe_m"])
    wsh = float(cfg["evidence_shadow_weight"])
    out: dict[str, Any] = {"evidence": e0, "spread_k": sp0}
    for name, ax in zip(("u", "v"), _unit_axes(sample)):
        num, den = 0.0, 0.0
        lowest = np.isfinite(sd_at)
        for sgn in (1.0, -1.0):
            step = sgn * ax * d
            p = placement.moved(tx=placement.tx + step[0], ty=placement.ty + step[1])
            sd_p = module_spread(sample, p, local=local, inset_u=inset, inset_v=inset)
            e = evidence(sd_p)
            lowest &= np.isfinite(sd_p) & (sd_at < sd_p)  # a footprint's own minimum: lower than either probe
            # away from the sun: onto the table's shadow, which may look like glass
            w = wsh if (sun is not None and float(step @ np.asarray(sun[:2])) < 0) else 1.0
            if math.isfinite(e):
                num += w * e
                den += w
        e_probe = num / den if den > 0 else float("nan")
        out[f"ratio_{name}"] = sp0 / e_probe if (math.isfinite(e_probe) and e_probe > 0) else float("nan")
        n_fin = np.count_nonzero(np.isfinite(sd_at))
        out[f"minimum_share_{name}"] = np.count_nonzero(lowest) / n_fin if n_fin else float("nan")
    lim = float(cfg["evidence_max_ratio"])
    exp_c = float(expected_c) if expected_c is not None else math.nan
    known = math.isfinite(exp_c)
    out["glass_error_k"] = glass - exp_c if known else float("nan")
    glass_ok = (not known) or abs(out["glass_error_k"]) <= float(cfg["evidence_glass_max_k"])
    by_ratio = all(math.isfinite(out[f"ratio_{a}"]) and out[f"ratio_{a}"] <= lim for a in ("u", "v"))
    # a placement a few decimetres off has most footprints lower on one side (nearer their module)
    by_share = all(out[f"minimum_share_{a}"] >= float(cfg["evidence_min_share"]) for a in ("u", "v"))
    out["ok"] = bool((by_ratio or by_share) and math.isfinite(e0) and glass_ok)
    return out
