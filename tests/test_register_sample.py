"""The registration's module sample (``register.evidence.sample_modules``): the windows placed
for all modules at once are those of one module at a time.

The reference below is the per-module computation written out plainly (the tile holding the
module's centre, the window corner by Python's ``round`` of the centre's pixel position minus
half the window, the first pixel's centre through the tile's affine transform) and the
window medians are numpy's ``nanmedian`` (a reference library); the sampler must give the
same pixels, corners and medians bit for bit.
"""
from __future__ import annotations

import math
import warnings
from types import SimpleNamespace

import geopandas as gpd
import numpy as np
import pytest
from affine import Affine
from rasterio.coords import BoundingBox
from rasterio.windows import Window

from pvscan.measure.register.evidence import sample_modules


class _FakeOrthos:
    """Two overlapping north-up tiles of random values (NaN in places), read by window."""

    def __init__(self, rng: np.random.Generator) -> None:
        self.images, tiles = [], []
        for j, (x0, y0, gsd) in enumerate(((1000.0, 2000.0, 0.05), (1019.3, 2003.7, 0.05))):
            h, w = 500, 500
            img = rng.normal(40.0, 2.0, (h, w)).astype(np.float32)
            img[rng.random((h, w)) < 0.02] = np.nan
            t = Affine(gsd, 0.0, x0, 0.0, -gsd, y0)
            tiles.append(SimpleNamespace(index=j, transform=t, width=w, height=h,
                                         bounds=BoundingBox(x0, y0 - h * gsd, x0 + w * gsd, y0)))
            self.images.append(img)
        self.tiles = tuple(tiles)

    def read(self, ti: int, win: Window) -> np.ndarray:
        img = self.images[ti]
        r0, c0, h, w = int(win.row_off), int(win.col_off), int(win.height), int(win.width)
        out = np.full((h, w), np.nan, np.float32)
        rr0, rr1 = max(r0, 0), min(r0 + h, img.shape[0])
        cc0, cc1 = max(c0, 0), min(c0 + w, img.shape[1])
        if rr1 > rr0 and cc1 > cc0:
            out[rr0 - r0:rr1 - r0, cc0 - c0:cc1 - c0] = img[rr0:rr1, cc0:cc1]
        return out


def _modules(rng: np.random.Generator, n: int) -> gpd.GeoDataFrame:
    ang = rng.uniform(0.0, math.pi, n)
    lu, lv = rng.uniform(1.6, 2.3, n), rng.uniform(0.95, 1.15, n)
    ux, uy = lu * np.cos(ang), lu * np.sin(ang)
    vx, vy = -lv * np.sin(ang), lv * np.cos(ang)
    # centres over both tiles, beyond their edges too (windows padded with NaN)
    cx, cy = rng.uniform(998.0, 1046.0, n), rng.uniform(1973.0, 2006.0, n)
    x0, y0 = cx - 0.5 * (ux + vx), cy - 0.5 * (uy + vy)
    return gpd.GeoDataFrame({"fx0": x0, "fy0": y0, "fux": ux, "fuy": uy, "fvx": vx, "fvy": vy,
                             "table_id": [f"T{i % 7}" for i in range(n)]},
                            geometry=gpd.points_from_xy(cx, cy))


def _reference(orthos: _FakeOrthos, fr: np.ndarray, idx: np.ndarray, side_px: int, reduce: int):
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    vals, xs0, ys0 = [], [], []
    for i in idx:
        ti = 0
        for j, t in enumerate(orthos.tiles):
            b = t.bounds
            if b.left <= cx[i] <= b.right and b.bottom <= cy[i] <= b.top:
                ti = j
                break
        tr = orthos.tiles[ti].transform
        col, row = ~tr * (cx[i], cy[i])
        c0, r0 = int(round(col - side_px / 2.0)), int(round(row - side_px / 2.0))
        a = orthos.read(ti, Window(c0, r0, side_px, side_px)).astype(np.float32)
        if reduce > 1:
            a = a.reshape(side_px // reduce, reduce, side_px // reduce, reduce)
            with warnings.catch_warnings(), np.errstate(invalid="ignore"):
                warnings.simplefilter("ignore", RuntimeWarning)
                a = np.nanmean(a, axis=(1, 3))
        vals.append(a)
        px, py = tr * (c0 + reduce / 2.0, r0 + reduce / 2.0)
        xs0.append(px)
        ys0.append(py)
    return np.stack(vals), np.array(xs0), np.array(ys0)


@pytest.mark.parametrize("reduce", [1, 2, 3])
def test_sampled_windows_are_those_of_one_module_at_a_time(rng, reduce):
    orthos = _FakeOrthos(rng)
    mods = _modules(rng, 300)
    margin = float(rng.uniform(0.2, 0.6))
    got = sample_modules(orthos, mods, n=len(mods) if reduce == 1 else 90, margin_m=margin, reduce=reduce,
                         seed=int(rng.integers(1 << 30)))
    fr = mods[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy(float)
    side = got.values.shape[1] * reduce
    vals, xs0, ys0 = _reference(orthos, fr, got.index, side, reduce)
    assert np.array_equal(got.x0, xs0) and np.array_equal(got.y0, ys0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # windows wholly off the tiles
        med = np.nanmedian(vals.reshape(len(vals), -1), axis=1)
    med = np.where(np.isfinite(med), med, 0.0).astype(np.float32)
    assert np.array_equal(got.ref, med.astype(np.float64))
    # the sample keeps its windows centred on their medians (float32)
    want = vals - med[:, None, None]
    assert np.array_equal(got.values, want, equal_nan=True)
    assert got.values.dtype == np.float32
    # both tiles are used, and some windows reach beyond a tile (NaN padding)
    cx = fr[got.index, 0] + 0.5 * (fr[got.index, 2] + fr[got.index, 4])
    assert (cx > orthos.tiles[0].bounds.right).any() and (cx < orthos.tiles[0].bounds.right).any()


def _cells_reference(read, tiles, gx, gy, stx, sty, ks):
    """The table ends' cell samples one tile-selection at a time (scipy's bilinear
    ``map_coordinates`` on each module's own window)."""
    from scipy.ndimage import map_coordinates

    m = len(gx)
    px = np.stack([gx + k * stx[:, None, None] for k in ks], axis=1).reshape(m, -1)
    py = np.stack([gy + k * sty[:, None, None] for k in ks], axis=1).reshape(m, -1)
    out = np.empty_like(px)
    for i in range(m):
        mx, my = float(np.mean(px[i])), float(np.mean(py[i]))
        ti = next((j for j, t in enumerate(tiles)
                   if t.bounds.left <= mx <= t.bounds.right and t.bounds.bottom <= my <= t.bounds.top), 0)
        cols, rows = ~tiles[ti].transform * (px[i], py[i])
        c0, r0 = int(np.floor(cols.min())) - 2, int(np.floor(rows.min())) - 2
        c1, r1 = int(np.ceil(cols.max())) + 3, int(np.ceil(rows.max())) + 3
        img = read(ti, Window(c0, r0, c1 - c0, r1 - r0)).astype(np.float64)
        out[i] = map_coordinates(img, [rows - r0 - 0.5, cols - c0 - 0.5], order=1, mode="constant", cval=np.nan)
    return out.reshape(m, len(ks), -1)


@pytest.mark.parametrize("n_tiles", [1, 2])
def test_table_end_cells_are_those_of_one_module_at_a_time(rng, n_tiles):
    from pvscan.measure.register.ends import _sample_cells

    orthos = _FakeOrthos(rng)
    tiles = list(orthos.tiles[:n_tiles])
    m, nn, na = 150, 6, 3
    ang = rng.uniform(0.0, math.pi, m)
    step = rng.uniform(0.15, 0.3, m)
    x0, y0 = rng.uniform(1001.0, 1040.0, m), rng.uniform(1977.0, 2003.0, m)
    a, b = np.arange(nn)[None, :, None], np.arange(na)[None, None, :]
    gx = x0[:, None, None] + step[:, None, None] * (a * np.cos(ang)[:, None, None] - b * np.sin(ang)[:, None, None])
    gy = y0[:, None, None] + step[:, None, None] * (a * np.sin(ang)[:, None, None] + b * np.cos(ang)[:, None, None])
    stx, sty = 1.7 * np.cos(ang), 1.7 * np.sin(ang)
    ks = (-1, 0, 1, 2)
    got = _sample_cells(orthos.read, tiles, gx, gy, stx, sty, ks)
    want = _cells_reference(orthos.read, tiles, gx, gy, stx, sty, ks)
    assert got.shape == (m, len(ks), nn * na)
    assert np.array_equal(got, want, equal_nan=True)
    assert np.isfinite(got).mean() > 0.2  # not a comparison of NaN only
