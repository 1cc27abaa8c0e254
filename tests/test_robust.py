"""NaN-aware order statistics (pvscan.robust) against NumPy's own.

References: ``numpy.nanquantile`` / ``numpy.nanmedian`` (linear interpolation between the two
nearest order statistics, NumPy's default method), ``numpy.nanmin`` / ``numpy.nanmax`` (the
quantiles 0 and 1 are the extreme order statistics exactly).
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from conftest import test_seed

from pvscan.robust import iqr, nanmedian, nanpercentile, nanquantile


def _arrays(rng: np.random.Generator, count: int):
    """Random arrays of 1-3 axes with NaN (none to most of a row), ties and whole NaN rows."""
    for _ in range(count):
        nd = int(rng.integers(1, 4))
        shape = tuple(int(x) for x in rng.integers(1, 14, nd))
        a = rng.normal(30.0, 4.0, shape)
        if rng.random() < 0.3:
            a = np.round(a)  # ties
        a[rng.random(shape) < rng.uniform(0.0, 0.8)] = np.nan
        axis = None if rng.random() < 0.2 else int(rng.integers(-nd, nd))
        yield a, axis


def test_quantiles_match_numpy_with_nan():
    # reference: numpy.nanquantile, default linear method (NumPy interpolates with another
    # rounding order, so agreement to 1e-12 relative, not bit for bit)
    rng = np.random.default_rng(test_seed())
    for a, axis in _arrays(rng, 400):
        q = float(rng.choice([0.1, 0.25, 0.5, 0.75, 0.9, rng.random()]))
        got = nanquantile(a, q, axis=axis)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN slices
            want = np.nanquantile(a, q, axis=axis)
        assert np.shape(got) == np.shape(want)
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=0.0, equal_nan=True)


def test_extreme_quantiles_are_the_extreme_values_exactly():
    # reference: numpy.nanmin / numpy.nanmax; the median of an odd count is one of the values
    rng = np.random.default_rng(test_seed() + 1)
    for a, axis in _arrays(rng, 200):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = np.nanmin(a, axis=axis), np.nanmax(a, axis=axis)
        assert np.array_equal(nanquantile(a, 0.0, axis=axis), lo, equal_nan=True)
        assert np.array_equal(nanquantile(a, 1.0, axis=axis), hi, equal_nan=True)
    row = rng.normal(0.0, 1.0, 9)
    assert nanmedian(row) == np.sort(row)[4]


def test_all_nan_rows_give_nan_without_a_warning():
    a = np.full((5, 8), np.nan)
    a[2, :3] = [1.0, 2.0, 4.0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = nanmedian(a, axis=1)
    assert np.isnan(got[[0, 1, 3, 4]]).all() and got[2] == 2.0


def test_percentiles_and_iqr_are_the_quantiles():
    # reference: numpy.nanpercentile (q in percent, stacked along a new first axis)
    rng = np.random.default_rng(test_seed() + 2)
    a = rng.normal(0.0, 2.0, (300, 24))
    a[rng.random(a.shape) < 0.3] = np.nan
    got = nanpercentile(a, [25, 75], axis=1)
    np.testing.assert_allclose(got, np.nanpercentile(a, [25, 75], axis=1), rtol=1e-12)
    np.testing.assert_allclose(iqr(a, axis=1), got[1] - got[0], rtol=0, atol=0)
    assert got.shape == (2, 300)


@pytest.mark.parametrize("n", [1, 8, 72, 300])
def test_rows_of_any_length(n):
    # reference: numpy.nanquantile; rows longer than 255 values take the sorted count path
    rng = np.random.default_rng(test_seed() + n)
    a = rng.normal(0.0, 1.0, (40, n))
    a[rng.random(a.shape) < 0.25] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        want = np.nanquantile(a, 0.3, axis=1)
    np.testing.assert_allclose(nanquantile(a, 0.3, axis=1), want, rtol=1e-12, equal_nan=True)
