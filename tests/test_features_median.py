"""The neighbour medians of diagnose/features.py: a sorting network across contiguous slices
gives the very numbers of pvscan.robust.nanmedian along a last axis (bit for bit, for every
number of neighbours up to the network's longest and one beyond), with
NaN, infinities, missing neighbours and empty neighbourhoods."""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from pvscan.diagnose.features import _BOX_OFFSETS, _network, cell_neighbour_median, neighbour_median
from pvscan.robust import nanmedian


@pytest.mark.parametrize("k", range(1, 13))
def test_network_sorts_every_zero_one_input(k):
    """A comparator network sorts every input if it sorts every 0-1 input (Knuth's 0-1
    principle); 2^k inputs checked at once, one column each."""
    x = np.array(list(itertools.product((0, 1), repeat=k)), dtype=np.int8).T.copy()
    for i, j in _network(k):
        assert 0 <= i < j < k
        lo, hi = np.minimum(x[i], x[j]), np.maximum(x[i], x[j])
        x[i], x[j] = lo, hi
    assert (np.diff(x, axis=0) >= 0).all()


def _values(rng, shape, dtype=np.float64):
    """Temperatures with NaN, a few infinities and exact ties."""
    v = np.round(rng.normal(40.0, 3.0, size=shape), 1).astype(dtype)
    flat = v.reshape(-1)
    pick = rng.random(flat.size)
    flat[pick < 0.15] = np.nan
    flat[(pick >= 0.15) & (pick < 0.17)] = np.inf
    flat[(pick >= 0.17) & (pick < 0.19)] = -np.inf
    return v


def _reference(values, nb, offset=None):
    """The median as gathered along a last axis and taken by pvscan.robust.nanmedian."""
    n = len(values)
    flat = np.asarray(values).reshape(n, -1)
    g = np.empty((n, flat.shape[1], nb.shape[1]), dtype=np.float64)
    for j in range(nb.shape[1]):
        jj = np.maximum(nb[:, j], 0)
        g[:, :, j] = flat[jj] if offset is None else flat[jj] - offset[jj][:, None]
        g[nb[:, j] < 0, :, j] = np.nan
    return nanmedian(g, axis=-1).reshape(np.shape(values))


@pytest.mark.parametrize("k", range(1, 18))
@pytest.mark.parametrize("with_offset", [False, True])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_neighbour_median_is_robust_nanmedian_bit_for_bit(rng, k, with_offset, dtype):
    n = 301
    values = _values(rng, (n, 4, 3), dtype)
    nb = rng.integers(0, n, size=(n, k))
    nb[rng.random((n, k)) < 0.3] = -1
    nb[:7] = -1  # modules without any neighbour
    offset = rng.normal(40.0, 1.0, size=n) if with_offset else None
    with np.errstate(invalid="ignore"):  # inf - inf between equal order statistics, both ways
        got = neighbour_median(values, nb, chunk=64, offset=offset)
        want = _reference(values, nb, offset)
    assert got.shape == values.shape and got.dtype == np.float64
    assert np.array_equal(got.view(np.uint64), want.view(np.uint64))
    assert np.isnan(got[:7]).all()
    assert np.isfinite(got).any()


def test_empty_neighbourhoods_give_nan_without_a_warning(rng):
    """Modules without any finite neighbour value (no neighbour, or only NaN) give NaN and no
    RuntimeWarning (the suite turns warnings into errors), as the sort along an axis did."""
    n = 50
    values = np.round(rng.normal(40.0, 3.0, size=(n, 4, 3)), 1)
    values[:10] = np.nan
    nb = rng.integers(0, 10, size=(n, 8))  # the first half: only all-NaN neighbours
    nb[n // 2:] = rng.integers(10, n, size=(n - n // 2, 8))
    nb[-5:] = -1
    got = neighbour_median(values, nb, chunk=16, offset=np.zeros(n))
    assert np.isnan(got[: n // 2]).all() and np.isnan(got[-5:]).all()
    assert np.isfinite(got[n // 2:-5]).all()
    X = np.full((3, 4, 3), np.nan)
    X[1, 0, 0] = 40.0
    cm = cell_neighbour_median(X)
    assert np.isnan(cm[0]).all() and cm[1, 0, 1] == 40.0 and np.isnan(cm[1, 0, 0])


def test_cell_neighbour_median_is_robust_nanmedian_bit_for_bit(rng):
    n, A, C = 97, 6, 5
    X = _values(rng, (n, A, C))
    X[0] = np.nan  # a module without data
    P = np.pad(X, ((0, 0), (1, 1), (1, 1)), constant_values=np.nan)
    g = np.stack([P[:, 1 + di:1 + di + A, 1 + dj:1 + dj + C] for di, dj in _BOX_OFFSETS], axis=-1)
    with np.errstate(invalid="ignore"):  # inf - inf between equal order statistics, both ways
        got = cell_neighbour_median(X, chunk=16)
        want = nanmedian(g, axis=-1)
    assert np.array_equal(got.view(np.uint64), want.view(np.uint64))
    assert np.isnan(got[0]).all() and np.isfinite(got[1:]).any()


def test_default_chunks_give_the_numbers_of_one_chunk(rng):
    """The default chunk (a fixed count of values per neighbour slice) splits these modules
    into several chunks; the medians are those of one chunk over all and of the reference."""
    from pvscan.diagnose.features import _SLICE_VALUES
    n, A, C = 1500, 6, 4
    assert n * A * C > 2 * _SLICE_VALUES  # several default chunks
    X = _values(rng, (n, A, C))
    nb = rng.integers(0, n, size=(n, 8))
    nb[rng.random((n, 8)) < 0.2] = -1
    offset = rng.normal(40.0, 1.0, size=n)
    with np.errstate(invalid="ignore"):  # inf - inf between equal order statistics, both ways
        got = neighbour_median(X, nb, offset=offset)
        one = neighbour_median(X, nb, chunk=n, offset=offset)
        want = _reference(X, nb, offset)
        cells = cell_neighbour_median(X)
        cells_one = cell_neighbour_median(X, chunk=n)
    assert np.array_equal(got.view(np.uint64), one.view(np.uint64))
    assert np.array_equal(got.view(np.uint64), want.view(np.uint64))
    assert np.array_equal(cells.view(np.uint64), cells_one.view(np.uint64))
