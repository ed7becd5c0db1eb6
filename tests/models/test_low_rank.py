"""LowRankDepthPSF against the expanded shift-invariant model and scipy convolution."""

from __future__ import annotations

import numpy as np
import pytest
from operator_family import OperatorChecks
from scipy.signal import fftconvolve

import volrecon
from volrecon.errors import DataError, ShapeError
from volrecon.models import DepthConvolutionPSF, Geometry, LowRankDepthPSF, PSFModel

GEOMETRY = Geometry(2.0, 0.5, -3.0)


def _random_model(rng, z=5, ny=13, nx=10, r=2, dtype=np.float32):
    kernels = rng.random((r, ny, nx))
    weights = rng.standard_normal((z, r))
    return LowRankDepthPSF(kernels, weights, GEOMETRY, dtype=dtype,
                           calibration={"note": "random test model"})


class TestLowRankOperator(OperatorChecks):
    def make(self, rng, dtype):
        return _random_model(rng, z=4, ny=9, nx=8, r=2, dtype=dtype)


@pytest.mark.parametrize("shape, rank", [((5, 13, 10), 2), ((1, 8, 8), 1), ((6, 12, 17), 6)])
def test_forward_adjoint_equal_expanded_depth_convolution(rng, shape, rank):
    z, ny, nx = shape
    model = _random_model(rng, z, ny, nx, rank, dtype=np.float64)
    # Reference: DepthConvolutionPSF of the expanded stack h_z = Σ_r U[z, r] g_r, itself
    # checked against scipy.signal.fftconvolve; float64 rounding only.
    full = DepthConvolutionPSF(np.einsum("zr,ryx->zyx", model.weights_zr, model.kernels_ryx),
                               GEOMETRY, dtype=np.float64)
    volume = rng.standard_normal(shape)
    image = rng.standard_normal((ny, nx))
    np.testing.assert_allclose(model.forward(volume), full.forward(volume), rtol=1e-10,
                               atol=1e-10)
    np.testing.assert_allclose(model.adjoint(image), full.adjoint(image), rtol=1e-10,
                               atol=1e-10)
    np.testing.assert_allclose(model.transfer_functions(), full.transfer_functions(),
                               rtol=1e-10, atol=1e-10)


def test_forward_matches_scipy_convolution(rng):
    model = _random_model(rng, 3, 11, 14, 2, dtype=np.float64)
    stack = model.expanded_stack()
    volume = rng.random(model.shape_in)
    _, ny, nx = stack.shape
    # Reference: scipy.signal.fftconvolve, cropped at (Y//2, X//2) (centre convention).
    expected = sum(fftconvolve(v, h)[ny // 2 : ny // 2 + ny, nx // 2 : nx // 2 + nx]
                   for v, h in zip(volume, stack, strict=True))
    np.testing.assert_allclose(model.forward(volume), expected, rtol=1e-9, atol=1e-9)


def test_depth_responses_span_exactly_rank_dimensions(rng):
    z, ny, nx, r = 7, 10, 9, 3
    model = _random_model(rng, z, ny, nx, r, dtype=np.float64)
    responses = []
    for plane in range(z):
        point = np.zeros(model.shape_in)
        point[plane, ny // 2, nx // 2] = 1.0
        responses.append(model.forward(point).ravel())
    # Reference: numpy.linalg.matrix_rank of the Z responses to a centred point.
    assert np.linalg.matrix_rank(np.array(responses), tol=1e-8) == r


def test_memory_is_r_planes_not_z(rng):
    model = _random_model(rng, z=40, ny=16, nx=16, r=2)
    # Known truth: only the r kernel spectra are kept, whatever Z is.
    assert model._spectra.shape[0] == 2
    assert model.transfer_functions().shape[0] == 40


def test_save_load_keeps_kind_and_calibration(rng, tmp_path):
    model = _random_model(rng)
    model.save(tmp_path / "lr.zarr")
    loaded = PSFModel.load(tmp_path / "lr.zarr")
    assert isinstance(loaded, LowRankDepthPSF) and loaded.kind == "depth-low-rank"
    assert loaded.rank == 2 and loaded.calibration == {"note": "random test model"}
    np.testing.assert_array_equal(loaded.kernels_ryx, model.kernels_ryx)
    np.testing.assert_array_equal(loaded.weights_zr, model.weights_zr)


def test_admm_exact_solve_equals_expanded_model(rng):
    n = 16
    yy, xx = np.mgrid[:n, :n]
    kernels = np.stack([np.exp(-((yy - 8) ** 2 + (xx - 8 - s) ** 2) / (2 * w**2))
                        for s, w in ((0, 1.0), (3, 1.5))])
    weights = np.array([[1.0, 0.0], [0.5, 0.5], [0.0, 1.0]])
    low = LowRankDepthPSF(kernels, weights, GEOMETRY)
    full = DepthConvolutionPSF(low.expanded_stack(), GEOMETRY)
    truth = np.zeros(low.shape_in, np.float32)
    truth[0, 5, 6] = truth[2, 10, 9] = 1.0
    frame = full.forward(truth)
    # Reference: the same solver on the DepthConvolutionPSF of the expanded stack; both give
    # ADMM identical transfer functions, so only float32 rounding may differ.
    a = volrecon.reconstruct(frame, low, method="admm", iterations=30, tol=0)
    b = volrecon.reconstruct(frame, full, method="admm", iterations=30, tol=0)
    np.testing.assert_allclose(a, b, rtol=1e-3, atol=1e-4 * float(b.max()))


@pytest.mark.parametrize("kernels, weights, error, match", [
    (np.ones((4, 4)), np.ones((2, 1)), ShapeError, "kernels_ryx"),
    (np.ones((0, 4, 4)), np.ones((2, 0)), ShapeError, "kernels_ryx"),
    (np.ones((2, 4, 4)), np.ones((3, 1)), ShapeError, "weights_zr"),
    (np.ones((2, 4, 4)), np.ones(3), ShapeError, "weights_zr"),
    (np.full((1, 4, 4), np.nan), np.ones((2, 1)), DataError, "NaN"),
    (np.ones((1, 4, 4)), np.full((2, 1), np.inf), DataError, "NaN"),
])
def test_bad_arrays_are_refused(kernels, weights, error, match):
    with pytest.raises(error, match=match):
        LowRankDepthPSF(kernels, weights, GEOMETRY)
