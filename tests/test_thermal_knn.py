"""The reference's neighbour search (diagnose/thermal.py ``_knn``) against a brute-force
search: every pool point's distance computed and sorted (the definition of the k nearest,
here on random points where no two distances tie); on a grid where distances tie
exactly, the short first query with its settled rows against one full query; and the row
median of the reference against numpy.nanmedian."""
from __future__ import annotations

import warnings

import numpy as np
import pytest

import pvscan.diagnose.thermal as thermal
from pvscan.robust import numpy_nanmedian_rows


def _plant(rng, rows=12, cols=60, strings=(8, 31)):
    """Module centres of a jittered table grid [m] and strings of ``strings`` (low, high + 1)
    modules along the rows (-1 = no string for a few modules)."""
    r, c = np.divmod(np.arange(rows * cols), cols)
    xy = np.column_stack([c * 1.05, r * 2.3]) + rng.normal(0.0, 0.02, size=(rows * cols, 2))
    group = np.empty(rows * cols, dtype=np.int64)
    start, code = 0, 0
    while start < len(group):
        size = int(rng.integers(*strings))
        group[start:start + size] = code
        start, code = start + size, code + 1
    group[rng.random(len(group)) < 0.05] = -1
    return xy, group


def _brute(points, pool, k, radius, group=None, keep=None):
    """The first k pool points by distance within ``radius`` (self excluded), then those of
    the point's own group dropped and the first ``keep`` kept; -1 padded."""
    width = k if keep is None else keep
    out = np.full((len(points), width), -1, dtype=np.int64)
    for i, p in enumerate(points):
        d = np.sqrt(((points[pool] - p) ** 2).sum(axis=1))
        order = np.argsort(d, kind="stable")
        near = pool[order][d[order] < radius]
        near = near[near != i][:k]
        if group is not None and group[i] >= 0:
            near = near[group[near] != group[i]]
        near = near[:width]
        out[i, :len(near)] = near
    return out


@pytest.mark.parametrize("k,keep,radius,strings", [
    (6, None, 15.0, (8, 31)), (8, None, 25.0, (8, 31)), (104, 8, 25.0, (8, 31)), (104, 8, 6.0, (8, 31)),
    (40, 3, 25.0, (8, 31)),
    (104, 8, 25.0, (150, 200)),  # strings over three rows: the nearest spare ones all of the string
    (104, 8, 4.0, (150, 200)),   # ... and the few within the radius too
])
def test_knn_is_the_brute_force_search(rng, k, keep, radius, strings):
    xy, group = _plant(rng, strings=strings)
    pool = np.flatnonzero(rng.random(len(xy)) < 0.9)  # some modules are not allowed as reference
    grp = group if keep is not None else None
    got = thermal._knn(xy, pool, k, radius, group=grp, keep=keep)
    assert np.array_equal(got, _brute(xy, pool, k, radius, grp, keep))


def test_knn_short_query_rows_that_are_not_settled_are_asked_again(rng, monkeypatch):
    """Strings longer than the spare neighbours, and exact ties on an integer grid: the rows
    the short query cannot settle exist here, and every answer equals that of one full query
    (the spare set so large that the first query is the full one)."""
    rows, cols = 10, 70
    r, c = np.divmod(np.arange(rows * cols), cols)
    xy = np.column_stack([c * 1.0, r * 2.0])  # integer grid: left and right neighbours tie
    group = np.repeat(np.arange(rows * cols // 35), 35)  # 35-module strings along a row
    group[rng.random(len(group)) < 0.1] = -1
    pool = np.flatnonzero(rng.random(len(xy)) < 0.95)
    kf = 8 + 1 + thermal._KNN_SPARE
    dist, idx = thermal.cKDTree(xy[pool]).query(xy, k=kf, distance_upper_bound=25.0)
    settled = thermal._knn_settled(dist, idx, pool, np.arange(len(xy)), 8, group)
    assert (~settled).sum() > len(xy) // 2  # ties everywhere: most rows asked again
    short = thermal._knn(xy, pool, 104, 25.0, group=group, keep=8)
    monkeypatch.setattr(thermal, "_KNN_SPARE", 10_000)
    full = thermal._knn(xy, pool, 104, 25.0, group=group, keep=8)
    assert np.array_equal(short, full)
    # and the jittered plant, where ties are absent: most rows settle on the short query
    xy, group = _plant(rng)
    pool = np.arange(len(xy))
    dist, idx = thermal.cKDTree(xy).query(xy, k=kf, distance_upper_bound=25.0)
    settled = thermal._knn_settled(dist, idx, pool, pool, 8, group)
    assert settled.mean() > 0.5


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("k", [*range(31), 599, 600, 601, 602, 1024, 3136])
def test_row_median_is_numpy_nanmedian_bit_for_bit(rng, k, dtype):
    """The row medians of the reference, of the cell counts and of the registration's module
    windows (``robust.numpy_nanmedian_rows``) give numpy.nanmedian(axis=1) bit for bit and in
    the same type, with NaN, infinities, signed zeros, ties and all-NaN rows, on both of
    numpy's methods (masked-array median below 600 values a row, row by row from 600)."""
    a = np.round(rng.normal(0.0, 3.0, size=(500 if k < 600 else 120, k)), 1).astype(dtype)
    r = rng.random(a.shape)
    a[r < 0.3] = np.nan
    a[(r >= 0.3) & (r < 0.33)] = np.inf
    a[(r >= 0.33) & (r < 0.36)] = -np.inf
    a[(r >= 0.36) & (r < 0.40)] = -0.0
    a[:9] = np.nan
    a[9:12] = -0.0  # signed zeros only: numpy's mean of the middle values makes them +0
    a[12:15, 1:] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows
        want = np.nanmedian(a, axis=1) if k else np.full(len(a), np.nan)
    got = numpy_nanmedian_rows(a)
    assert got.dtype == want.dtype
    bits = np.uint64 if dtype == np.float64 else np.uint32
    assert np.array_equal(got.view(bits), want.view(bits))
    assert np.isnan(got[:9]).all()
