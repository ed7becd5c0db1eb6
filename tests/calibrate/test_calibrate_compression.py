"""Truncated SVD across depth against numpy.linalg.svd and the Eckart–Young theorem."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.calibrate import factor_psf_stack, select_rank, stack_singular_values
from volrecon.errors import ConfigError, DataError, ShapeError, VolreconWarning


@pytest.mark.parametrize("rank", [1, 3, 7, 10])
def test_truncation_error_is_the_eckart_young_value(rng, speckle, rank):
    stack = speckle(rng, 10, 32) + 1e-4 * rng.random((10, 32, 32))
    factors = factor_psf_stack(stack.astype(np.float32), rank=rank)
    approx = np.einsum("zr,ryx->zyx", factors.weights_zr.astype(np.float64),
                       factors.kernels_ryx.astype(np.float64))
    s = np.linalg.svd(stack.reshape(10, -1).astype(np.float32).astype(np.float64),
                      compute_uv=False)
    # Reference: numpy.linalg.svd and the Eckart–Young theorem: the best rank-r
    # approximation misses exactly sqrt(Σ_{i>=r} s_i²) in the Frobenius norm. Tolerance:
    # float32 storage of the factors (~1e-7 of ‖H‖) against the smallest error tested.
    expected = np.sqrt(np.sum(s[rank:] ** 2))
    assert np.linalg.norm(stack.astype(np.float32) - approx) == pytest.approx(
        expected, rel=1e-4, abs=3e-7 * np.linalg.norm(stack))
    np.testing.assert_allclose(factors.singular_values, s, rtol=1e-6, atol=1e-9 * s[0])
    assert factors.truncation_error == pytest.approx(expected, rel=1e-9)
    # Known truth: the kernels are orthonormal (right singular vectors).
    gram = np.einsum("ayx,byx->ab", factors.kernels_ryx.astype(np.float64),
                     factors.kernels_ryx.astype(np.float64))
    np.testing.assert_allclose(gram, np.eye(factors.rank), atol=1e-5)


def test_rank_auto_on_a_smooth_stack_is_below_z(gaussian):
    stack = gaussian(16, 40, waist_px=2.0, rayleigh_planes=6.0)
    factors = factor_psf_stack(stack, rank="auto", energy=0.999)
    # Known truth: Gaussians of slowly changing width are close to a few-term family, so
    # far fewer than Z = 16 terms keep 99.9 % of the energy.
    assert factors.rank < 16
    # Reference: the energies kept by numpy.linalg.svd's singular values; the chosen rank is
    # the first that reaches 99.9 %.
    s = np.linalg.svd(np.asarray(stack, np.float64).reshape(16, -1), compute_uv=False)
    kept = np.cumsum(s**2) / np.sum(s**2)
    assert kept[factors.rank - 1] >= 0.999 and (factors.rank == 1 or kept[factors.rank - 2] < 0.999)


def test_select_rank_definition():
    s = np.sqrt(np.array([50.0, 30.0, 15.0, 4.0, 1.0]))  # energies sum to 100
    # Known truth: cumulative energies 0.5, 0.8, 0.95, 0.99, 1.0.
    assert [select_rank(s, e) for e in (0.5, 0.8, 0.9, 0.99, 0.995, 1.0)] == [1, 2, 3, 4, 5, 5]


def test_singular_values_match_numpy(rng):
    stack = rng.random((5, 9, 11))
    # Reference: numpy.linalg.svd of the (Z × pixels) matrix.
    np.testing.assert_allclose(stack_singular_values(stack),
                               np.linalg.svd(stack.reshape(5, -1), compute_uv=False),
                               rtol=1e-9)


def test_rank_deficient_stack_warns_and_lowers_rank(rng):
    base = rng.random((2, 8, 8))
    stack = np.stack([base[0], base[1], base[0] + base[1], base[0] - base[1]])
    with pytest.warns(VolreconWarning, match="lowered to 2"):
        factors = factor_psf_stack(stack, rank=4)
    # Known truth: four planes built from two independent ones have rank 2.
    assert factors.rank == 2


@pytest.mark.parametrize("stack, kwargs, error, match", [
    (np.ones((4, 4)), {"rank": 1}, ShapeError, "3 axes"),
    (np.ones((3, 4, 4)), {"rank": 0}, ConfigError, "--rank"),
    (np.ones((3, 4, 4)), {"rank": 4}, ConfigError, "Z = 3"),
    (np.ones((3, 4, 4)), {"rank": "most"}, ConfigError, "--rank"),
    (np.ones((3, 4, 4)), {"rank": "auto", "energy": 0.0}, ConfigError, "--energy"),
    (np.ones((3, 4, 4)), {"rank": "auto", "energy": 1.5}, ConfigError, "--energy"),
    (np.full((3, 4, 4), np.nan), {"rank": 1}, DataError, "NaN"),
    (np.zeros((3, 4, 4)), {"rank": 1}, DataError, "all zero"),
])
def test_bad_input_is_refused(stack, kwargs, error, match):
    with pytest.raises(error, match=match):
        factor_psf_stack(stack, **kwargs)


def test_singular_values_need_a_stack():
    with pytest.raises(ShapeError, match="3 axes"):
        stack_singular_values(np.ones(4))
