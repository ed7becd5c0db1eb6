"""Solvers against cvxpy optima, scikit-image's Richardson–Lucy and a known bead volume."""

from __future__ import annotations

import cvxpy as cp
import numpy as np
import pytest
import scipy.sparse as sp
from skimage.restoration import richardson_lucy

import volrecon
from volrecon.errors import ConfigError, DataError, ShapeError
from volrecon.models import PSFModel
from volrecon.solvers import SolverState, objective, tv_value


def _gaussian_psf(rng, nz, n, *, spots=3):
    """Depth-dependent multi-spot PSF: each plane a few Gaussian spots of growing width."""
    yy, xx = np.mgrid[:n, :n]
    psf = np.zeros((nz, n, n))
    for z in range(nz):
        width = 0.8 + 0.6 * z
        for _ in range(spots):
            cy, cx = n // 2 + rng.integers(-n // 4, n // 4 + 1, size=2)
            psf[z] += np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * width**2))
    return psf / psf.sum(axis=(1, 2), keepdims=True)


def _dense_operator(psf):
    """Explicit matrix of Σ_z h_z ⊛ v_z with the centre convention, built by index arithmetic
    (independent of the FFT code under test)."""
    nz, ny, nx = psf.shape
    cy, cx = ny // 2, nx // 2
    rows, cols, vals = [], [], []
    for z in range(nz):
        for yp in range(ny):
            for xp in range(nx):
                col = (z * ny + yp) * nx + xp
                for y in range(ny):
                    ky = y - yp + cy
                    if not 0 <= ky < ny:
                        continue
                    for x in range(nx):
                        kx = x - xp + cx
                        if 0 <= kx < nx and psf[z, ky, kx] != 0:
                            rows.append(y * nx + x)
                            cols.append(col)
                            vals.append(psf[z, ky, kx])
    return sp.csr_matrix((vals, (rows, cols)), shape=(ny * nx, nz * ny * nx))


def _tv_operators(nz, ny, nx, z_weight):
    """Sparse forward differences of the TV definition: zero-extended by one pixel laterally
    with periodic wrap (Dirichlet ends), Neumann along depth; as documented in solvers.tv."""

    def periodic(n):
        return sp.diags([-np.ones(n), np.ones(n - 1)], [0, 1], shape=(n, n)).tolil()

    py, px = ny + 1, nx + 1
    dy = periodic(py)
    dy[py - 1, 0] = 1
    dx = periodic(px)
    dx[px - 1, 0] = 1
    dz = sp.diags([-np.ones(nz), np.ones(nz - 1)], [0, 1], shape=(nz, nz)).tolil()
    dz[nz - 1, nz - 1] = 0
    eye = sp.identity
    d_y = sp.kron(sp.kron(eye(nz), dy.tocsr()), eye(px))
    d_x = sp.kron(sp.kron(eye(nz), eye(py)), dx.tocsr())
    d_z = z_weight * sp.kron(sp.kron(dz.tocsr(), eye(py)), eye(px))
    # embedding of the field into the padded grid
    keep = np.zeros((nz, py, px), bool)
    keep[:, :ny, :nx] = True
    embed = sp.identity(nz * py * px, format="csr")[:, keep.ravel()]
    return [d @ embed for d in (d_y, d_x, d_z)]


def _cvxpy_optimum(psf, frame, *, tv, l1, z_weight=1.0):
    nz, ny, nx = psf.shape
    a = _dense_operator(psf)
    v = cp.Variable(nz * ny * nx, nonneg=True)
    cost = 0.5 * cp.sum_squares(a @ v - frame.ravel()) + l1 * cp.sum(v)
    if tv:
        g = [d @ v for d in _tv_operators(nz, ny, nx, z_weight)]
        cost += tv * cp.sum(cp.norm(cp.vstack(g), 2, axis=0))
    problem = cp.Problem(cp.Minimize(cost))
    problem.solve(solver=cp.CLARABEL)
    return problem.value, v.value.reshape(nz, ny, nx)


@pytest.fixture(scope="module")
def small_problem():
    rng = np.random.default_rng(7)
    nz, n = 3, 12
    psf = _gaussian_psf(rng, nz, n)
    truth = np.zeros((nz, n, n))
    truth[0, 4, 5] = truth[1, 7, 8] = truth[2, 6, 3] = 1.0
    model = PSFModel.from_stack(psf, 2.0, 1.0)
    frame = model.forward(truth.astype(np.float32)) + 0.002 * rng.standard_normal((n, n))
    return psf, model, frame.astype(np.float32)


@pytest.mark.parametrize("method", ["admm", "fista"])
@pytest.mark.parametrize("tv, l1", [(0.0, 2e-3), (2e-3, 0.0)])
def test_objective_matches_cvxpy(small_problem, method, tv, l1):
    psf, model, frame = small_problem
    # Reference: cvxpy (Clarabel interior point) on the same problem written independently.
    optimum, _ = _cvxpy_optimum(psf, frame.astype(np.float64), tv=tv, l1=l1)
    _, info = volrecon.reconstruct(frame, model, method=method, iterations=3000, tv=tv, l1=l1,
                                   tol=1e-7, return_info=True)
    # The bound: converged objective within 1e-3 (relative) of the optimum.
    assert abs(info.objective - optimum) / optimum < 1e-3


def test_tv_value_matches_sparse_definition(rng):
    v = rng.random((3, 5, 6))
    d = _tv_operators(3, 5, 6, 0.7)
    g = np.stack([di @ v.ravel() for di in d])
    # Reference: the sparse-matrix TV used for the cvxpy problems.
    np.testing.assert_allclose(tv_value(v, 0.7), np.sqrt((g**2).sum(0)).sum(), rtol=1e-10)


def test_richardson_lucy_matches_skimage(rng):
    n = 48
    yy, xx = np.mgrid[:n, :n]
    kernel = np.exp(-((yy - n // 2) ** 2 + (xx - n // 2) ** 2) / (2 * 1.5**2))
    kernel[np.hypot(yy - n // 2, xx - n // 2) > 4] = 0
    kernel /= kernel.sum()
    image = np.zeros((n, n))
    image[18:30, 20:26] = 1.0
    image[24, 14] = 3.0
    model = PSFModel.from_stack(kernel[None], 1.0, 1.0, dtype=np.float64)
    blurred = model.forward(image[None])
    small = kernel[n // 2 - 4 : n // 2 + 5, n // 2 - 4 : n // 2 + 5]
    # Reference: skimage.restoration.richardson_lucy (same 0.5 start, eps = 1e-12). Its
    # 'same'-mode convolution does not divide by Aᵀ1; with a dark border that only matters at
    # the edges, so compare the interior.
    expected = richardson_lucy(blurred, small, num_iter=15, clip=False)
    got = volrecon.reconstruct(blurred, model, method="rl", iterations=15, tol=0.0,
                               init=np.full((1, n, n), 0.5))
    np.testing.assert_allclose(got[0, 8:-8, 8:-8], expected[8:-8, 8:-8], rtol=1e-6, atol=1e-9)


def _speckle_psf(rng, nz, n):
    """Depth-distinct sparse patterns (a stand-in for a diffuser caustic)."""
    psf = np.zeros((nz, n, n), np.float32)
    for z in range(nz):
        ys, xs = rng.integers(n // 4, 3 * n // 4, size=(2, 12))
        psf[z, ys, xs] = rng.random(12) + 0.5
    from scipy.ndimage import gaussian_filter

    psf = gaussian_filter(psf, (0, 0.8, 0.8))
    return psf / psf.sum(axis=(1, 2), keepdims=True)


@pytest.mark.parametrize("method", ["admm", "fista", "rl"])
def test_bead_volume_recovered(rng, method):
    nz, n = 8, 48
    model = PSFModel.from_stack(_speckle_psf(rng, nz, n), 2.0, 1.0)
    beads = [(0, 10, 12), (2, 30, 20), (3, 20, 36), (5, 38, 38), (7, 12, 30), (6, 24, 24)]
    truth = np.zeros((nz, n, n), np.float32)
    for z, y, x in beads:
        truth[z, y, x] = 1.0
    frame = model.forward(truth)
    frame += 0.002 * frame.max() * rng.standard_normal(frame.shape).astype(np.float32)
    volume = volrecon.reconstruct(frame, model, method=method, iterations=300, l1=1e-4)
    for z, y, x in beads:
        profile = volume[:, y - 1 : y + 2, x - 1 : x + 2].max(axis=(1, 2))
        # Known synthetic truth: every bead found within ±1 plane (the criterion).
        assert abs(int(profile.argmax()) - z) <= 1, (method, z, y, x, profile.round(3))


def test_warm_start_reuses_state(small_problem):
    _, model, frame = small_problem
    _, cold = volrecon.reconstruct(frame, model, iterations=400, tol=1e-4, l1=1e-3,
                                   return_info=True)
    assert isinstance(cold.state, SolverState)
    _, warm = volrecon.reconstruct(frame * 1.01, model, iterations=400, tol=1e-4, l1=1e-3,
                                   init=cold.state, return_info=True)
    # Known truth: a nearly identical frame started from the previous solution converges
    # in far fewer iterations.
    assert warm.iterations < cold.iterations / 2


def test_info_diagnostics(small_problem):
    _, model, frame = small_problem
    volume, info = volrecon.reconstruct(frame, model, method="fista", iterations=50, l1=1e-3,
                                        return_info=True)
    assert volume.dtype == np.float32 and volume.shape == model.shape_in and volume.min() >= 0
    assert info.iterations == 50 and not info.converged and info.seconds > 0
    # Reference: the objective and residual recomputed from their definitions.
    a_v = model.forward(volume).astype(np.float64)
    np.testing.assert_allclose(info.residual, np.linalg.norm(a_v - frame) / np.linalg.norm(frame),
                               rtol=1e-5)
    np.testing.assert_allclose(info.objective, objective(volume, frame, model, l1=1e-3), rtol=1e-9)


def test_frame_not_modified(small_problem):
    _, model, frame = small_problem
    before = frame.copy()
    for method in ("admm", "fista", "rl"):
        volrecon.reconstruct(frame, model, method=method, iterations=3)
    np.testing.assert_array_equal(frame, before)


def test_errors(small_problem):
    _, model, frame = small_problem
    with pytest.raises(ConfigError, match="method must be one of"):
        volrecon.reconstruct(frame, model, method="cg")
    with pytest.raises(ConfigError, match="iterations"):
        volrecon.reconstruct(frame, model, iterations=0)
    with pytest.raises(ConfigError, match="tv must be"):
        volrecon.reconstruct(frame, model, tv=-1.0)
    with pytest.raises(ShapeError, match="frame must have shape"):
        volrecon.reconstruct(frame[:-1], model)
    bad = frame.copy()
    bad[0, 0] = np.inf
    with pytest.raises(DataError, match="NaN or Inf"):
        volrecon.reconstruct(bad, model)
    with pytest.raises(ShapeError, match="init must have shape"):
        volrecon.reconstruct(frame, model, init=np.zeros((1, 2, 3)))
    with pytest.raises(ConfigError, match="tv_z_weight"):
        volrecon.reconstruct(frame, model, tv_z_weight=0.0)
