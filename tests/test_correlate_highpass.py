"""The high-pass of the registration's cross-power spectrum (measure/register/correlate.py):
computed on a quarter of the FFT grid and spread by index, it must be the very numbers of the
transfer function 1 - exp(-2 pi^2 sigma^2 f^2), squared, evaluated at every frequency of
numpy.fft.fftfreq (the Gaussian low-pass subtracted, as its docstring defines it)."""
from __future__ import annotations

import numpy as np
import pytest

from pvscan.measure.register.correlate import _highpass_squared, cross_power


def _direct(shape, sigma, dtype):
    f2 = np.fft.fftfreq(shape[0])[:, None] ** 2 + np.fft.fftfreq(shape[1])[None, :] ** 2
    h = -np.expm1(-2.0 * np.pi ** 2 * sigma ** 2 * f2)
    return (h * h).astype(dtype)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_quarter_grid_gives_every_value_of_the_whole_grid(rng, dtype):
    shapes = [(1, 1), (2, 3), (7, 8)] + [tuple(int(v) for v in rng.integers(2, 400, size=2)) for _ in range(6)]
    for shape in shapes:
        sigma = float(rng.uniform(0.3, 40.0))
        got = _highpass_squared(shape, sigma, np.dtype(dtype))
        want = _direct(shape, sigma, dtype)
        assert got.shape == want.shape and got.dtype == want.dtype
        assert np.array_equal(got.view(np.uint8), want.view(np.uint8)), (shape, sigma)
    # the filter passes high frequencies and stops the mean: 0 at f = 0, near 1 at Nyquist
    g = _highpass_squared((64, 64), 3.0, np.dtype(dtype))
    assert g[0, 0] == 0.0 and g[32, 32] > 0.999


def test_cross_power_with_the_high_pass_as_defined(rng):
    """cross_power(..., highpass_sigma_px) is the plain cross-power times the squared transfer
    function (both arrays filtered once each), bit for bit."""
    a = rng.normal(size=(45, 62)).astype(np.float32)
    b = rng.normal(size=(45, 62)).astype(np.float32)
    plain = cross_power(a, b, 0.0, 0.0, dtype=np.float32)
    filtered = cross_power(a, b, 0.0, 2.5, dtype=np.float32)
    assert np.array_equal(filtered, plain * _direct((45, 62), 2.5, np.float32))
