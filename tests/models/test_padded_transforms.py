"""The backend transforms the shift-invariant models are built on, against numpy.fft."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.backend import get_backend
from volrecon.models.depth_convolution import correlation_window


@pytest.mark.parametrize(("shape", "grid"), [((3, 7, 9), (14, 18)), ((2, 1, 5, 6), (11, 10)),
                                             ((4, 8, 8), (8, 16))])
@pytest.mark.parametrize("dtype, rtol", [(np.float32, 1e-5), (np.float64, 1e-12)])
def test_rfft2_of_fewer_rows_equals_the_padded_transform(rng, shape, grid, dtype, rtol):
    be = get_backend("cpu", threads=2)
    a = rng.standard_normal(shape).astype(dtype)
    # Reference: numpy.fft.rfft2 of the explicitly zero-padded array (float64).
    padded = np.zeros((*shape[:-2], *grid))
    padded[..., : shape[-2], : shape[-1]] = a
    expected = np.fft.rfft2(padded)
    got = be.rfft2(a, grid)
    assert got.dtype == (np.complex64 if dtype == np.float32 else np.complex128)
    np.testing.assert_allclose(got, expected, rtol=rtol, atol=rtol * np.abs(expected).max())


@pytest.mark.parametrize("reverse", [False, True])
@pytest.mark.parametrize("overwrite, use_out", [(False, False), (True, True)])
def test_irfft2_window(rng, reverse, overwrite, use_out):
    be = get_backend("cpu", threads=2)
    grid, window = (12, 15), (5, 7)
    spectrum = np.fft.rfft2(rng.standard_normal((3, *grid)))
    before = spectrum.copy()
    # Reference: numpy.fft.irfft2 on the whole grid, then the window (index-reversed with
    # `reverse`: r[-i mod Py, -j mod Px]).
    full = np.fft.irfft2(spectrum, s=grid)
    rows = -np.arange(window[0]) % grid[0]
    cols = -np.arange(window[1]) % grid[1]
    expected = full[:, rows][:, :, cols] if reverse else full[:, : window[0], : window[1]]
    out = np.full((3, *window), np.nan) if use_out else None
    got = be.irfft2_window(spectrum, grid, window, reverse=reverse, overwrite=overwrite,
                           out=out)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)
    if use_out:
        assert got is out
    if not overwrite:
        np.testing.assert_array_equal(spectrum, before)


@pytest.mark.parametrize("threads", [1, 2, 5])
@pytest.mark.parametrize("n", [1, 4, 7])
def test_run_split_covers_every_index_once(threads, n):
    be = get_backend("cpu", threads=threads)
    seen = np.zeros(n, int)

    def kernel(out, lo, hi):
        out[lo:hi] += 1

    be.run_split(kernel, n, seen)
    bounds = be.split_bounds(n)
    # Known truth: each index in exactly one range, at most `threads` ranges, sizes within 1.
    np.testing.assert_array_equal(seen, 1)
    sizes = np.diff(bounds)
    assert bounds[0] == 0 and bounds[-1] == n and len(sizes) <= threads
    assert sizes.min() >= 1 and sizes.max() - sizes.min() <= 1


@pytest.mark.parametrize(("grid", "window"), [((12, 15), (5, 7)), ((8, 16), (4, 8)),
                                              ((1, 1), (1, 1))])
@pytest.mark.parametrize("dtype, rtol", [(np.float32, 1e-5), (np.float64, 1e-12)])
def test_correlation_window(rng, grid, window, dtype, rtol):
    be = get_backend("cpu", threads=2)
    complex_dtype = np.complex64 if dtype == np.float32 else np.complex128
    products = np.fft.rfft2(rng.standard_normal((2, 3, *grid))).astype(complex_dtype)
    # Reference: numpy.fft.irfft2 of the conjugated products on the whole grid (float64),
    # then the window [0:Y, 0:X].
    expected = np.fft.irfft2(products.astype(np.complex128).conj(), s=grid)
    expected = expected[..., : window[0], : window[1]]
    out = np.full((2, 3, *window), np.nan, dtype=dtype)
    got = correlation_window(products, grid, window, be, out=out)
    assert got is out
    np.testing.assert_allclose(got, expected, rtol=rtol, atol=rtol * np.abs(expected).max())
    fresh = correlation_window(np.fft.rfft2(rng.standard_normal(grid)), grid, window, be)
    assert fresh.shape == window
