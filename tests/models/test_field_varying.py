"""FieldVaryingPSF against a brute-force spatially varying convolution; its weights."""

from __future__ import annotations

import numpy as np
import pytest
from operator_family import OperatorChecks
from scipy.interpolate import LinearNDInterpolator

import volrecon
from volrecon.errors import ConfigError, DataError, ShapeError
from volrecon.models import (
    DepthConvolutionPSF,
    FieldVaryingPSF,
    Geometry,
    PSFModel,
    interpolation_weights,
)

GEOMETRY = Geometry(1.5, 0.65)
POSITIONS = [[1.0, 1.0], [2.0, 7.0], [6.0, 3.0]]


def _random_model(rng, z=2, ny=7, nx=9, dtype=np.float32, per_depth=False):
    kernels = rng.random((z, len(POSITIONS), ny, nx))
    if per_depth:
        weights = rng.random((z, len(POSITIONS), ny, nx))
        return FieldVaryingPSF(kernels, weights, GEOMETRY, positions_yx=POSITIONS, dtype=dtype)
    return FieldVaryingPSF.from_positions(kernels, POSITIONS, GEOMETRY, dtype=dtype)


class TestFieldVaryingOperator(OperatorChecks):
    def make(self, rng, dtype):
        return _random_model(rng, dtype=dtype)


class TestFieldVaryingPerDepthWeights(OperatorChecks):
    def make(self, rng, dtype):
        return _random_model(rng, dtype=dtype, per_depth=True)


def _brute_force(volume, kernels, weights):
    """Σ over every source voxel of its value times its own blended, shifted PSF.

    h(x; x′) = Σ_k w_k(x′) g_k(x − x′), with the centre convention: the kernel's pixel
    (Y//2, X//2) lands on the source pixel. Loops only, no FFT.
    """
    z, k, ny, nx = kernels.shape
    w = np.broadcast_to(weights, (z, k, ny, nx))
    out = np.zeros((ny, nx))
    for plane in range(z):
        for sy in range(ny):
            for sx in range(nx):
                psf = np.einsum("k,kyx->yx", w[plane, :, sy, sx], kernels[plane])
                for y in range(ny):
                    ky = y - sy + ny // 2
                    if 0 <= ky < ny:
                        for x in range(nx):
                            kx = x - sx + nx // 2
                            if 0 <= kx < nx:
                                out[y, x] += volume[plane, sy, sx] * psf[ky, kx]
    return out


@pytest.mark.parametrize("per_depth", [False, True])
def test_forward_equals_brute_force_spatially_varying_convolution(rng, per_depth):
    model = _random_model(rng, z=2, ny=7, nx=9, dtype=np.float64, per_depth=per_depth)
    volume = rng.random(model.shape_in)
    # Reference: the defining sum over sources, computed by explicit loops (above).
    expected = _brute_force(volume, model.kernels_zkyx, model.weights)
    np.testing.assert_allclose(model.forward(volume), expected, rtol=1e-10, atol=1e-10)


def test_equal_kernels_reduce_to_shift_invariant_model(rng):
    psf = rng.random((3, 12, 11))
    kernels = np.repeat(psf[:, None], 3, axis=1)
    model = FieldVaryingPSF.from_positions(kernels, [[0, 0], [11, 2], [4, 10]], GEOMETRY,
                                           dtype=np.float64)
    volume = rng.random(model.shape_in)
    # Known truth: weights sum to 1, so identical kernels give DepthConvolutionPSF.
    np.testing.assert_allclose(model.forward(volume),
                               DepthConvolutionPSF(psf, GEOMETRY, dtype=np.float64)
                               .forward(volume), rtol=1e-10, atol=1e-10)
    assert model.transfer_functions() is None


def test_point_at_a_measured_position_gives_that_kernel(rng):
    kernels = rng.random((2, 3, 16, 16)).astype(np.float32)
    positions = [[8, 8], [3, 12], [13, 2]]
    model = FieldVaryingPSF.from_positions(kernels, positions, GEOMETRY)
    point = np.zeros(model.shape_in, np.float32)
    point[1, 8, 8] = 1.0
    # Known truth: weight k is 1 at position k, and the centre convention puts a point at
    # (Y//2, X//2) on the unshifted kernel.
    np.testing.assert_allclose(model.forward(point), kernels[1, 0], atol=1e-5)
    np.testing.assert_allclose(model.psf_at(3, 12), kernels[:, 1], atol=1e-6)


def test_weights_match_scipy_linear_interpolation_inside_hull():
    positions = np.array([[2.0, 3.0], [20.0, 5.0], [10.0, 28.0], [25.0, 25.0]])
    weights = interpolation_weights(positions, (30, 32))
    yy, xx = np.mgrid[:30, :32]
    # Reference: scipy.interpolate.LinearNDInterpolator (Delaunay, barycentric) of one-hot
    # values; inside the convex hull both are the same piecewise-linear functions.
    reference = LinearNDInterpolator(positions, np.eye(4))(yy, xx)  # (Y, X, K), NaN outside
    inside = np.isfinite(reference[..., 0])
    assert inside.sum() > 200
    np.testing.assert_allclose(weights.transpose(1, 2, 0)[inside], reference[inside],
                               atol=1e-9)
    # Partition of unity, non-negative, everywhere (outside the hull too).
    np.testing.assert_allclose(weights.sum(axis=0), 1.0, atol=1e-12)
    assert weights.min() >= 0


def test_weights_for_one_and_for_collinear_positions():
    np.testing.assert_array_equal(interpolation_weights([[3, 4]], (5, 6)), np.ones((1, 5, 6)))
    w = interpolation_weights([[0.0, 4.0], [0.0, 0.0], [0.0, 8.0]], (2, 10))
    # Known truth: piecewise-linear hat functions along x, constant beyond the end points.
    np.testing.assert_allclose(w[1, 0, :5], [1.0, 0.75, 0.5, 0.25, 0.0])
    np.testing.assert_allclose(w[0, 0, :9], [0, 0.25, 0.5, 0.75, 1, 0.75, 0.5, 0.25, 0])
    np.testing.assert_allclose(w[2, 1, 8:], [1.0, 1.0])
    np.testing.assert_allclose(w.sum(axis=0), 1.0)


def test_fista_runs_and_admm_is_refused_with_a_clear_message(rng):
    model = _random_model(rng, z=2, ny=12, nx=12)
    truth = np.zeros(model.shape_in, np.float32)
    truth[1, 6, 6] = 1.0
    frame = model.forward(truth)
    volume, info = volrecon.reconstruct(frame, model, method="fista", iterations=200,
                                        return_info=True)
    # Known truth: a noise-free frame of the model itself is fitted closely.
    assert info.residual < 0.05 and volume.min() >= 0
    with pytest.raises(ConfigError, match="fista"):
        volrecon.reconstruct(frame, model, method="admm")


def test_store_round_trip_keeps_positions(rng, tmp_path):
    model = _random_model(rng)
    model.save(tmp_path / "fv.zarr")
    loaded = PSFModel.load(tmp_path / "fv.zarr")
    assert loaded.kind == "field-varying" and loaded.n_kernels == 3
    np.testing.assert_array_equal(loaded.positions_yx, POSITIONS)


@pytest.mark.parametrize("kernels, weights, positions, error, match", [
    (np.ones((2, 4, 4)), np.ones((2, 4, 4)), None, ShapeError, "kernels_zkyx"),
    (np.ones((2, 2, 4, 4)), np.ones((3, 4, 4)), None, ShapeError, "weights"),
    (np.ones((2, 2, 4, 4)), np.ones((2, 4, 5)), None, ShapeError, "weights"),
    (np.ones((2, 2, 4, 4)), np.ones((2, 4, 4)), [[0, 0]], ShapeError, "positions_yx"),
    (np.full((1, 1, 4, 4), np.nan), np.ones((1, 4, 4)), None, DataError, "NaN"),
])
def test_bad_arrays_are_refused(kernels, weights, positions, error, match):
    with pytest.raises(error, match=match):
        FieldVaryingPSF(kernels, weights, GEOMETRY, positions_yx=positions)


@pytest.mark.parametrize("positions, error, match", [
    ([[0, 0], [1]], ShapeError, "positions_yx"),
    (np.zeros((0, 2)), ShapeError, "positions_yx"),
    ([[0, 0], [np.nan, 1]], DataError, "NaN"),
    ([[1, 1], [1, 1]], DataError, "coincide"),
])
def test_bad_positions_are_refused(positions, error, match):
    with pytest.raises(error, match=match):
        interpolation_weights(positions, (4, 4))


def test_from_positions_needs_one_position_per_kernel():
    with pytest.raises(ShapeError, match="one"):
        FieldVaryingPSF.from_positions(np.ones((1, 2, 4, 4)), [[0, 0]], GEOMETRY)
    with pytest.raises(ShapeError, match="4 axes"):
        FieldVaryingPSF.from_positions(np.ones((2, 4, 4)), [[0, 0]], GEOMETRY)
