"""The temporal prior: frames of a window solved together with ½·weight·Σ‖v_{t+1} − v_t‖²."""

from __future__ import annotations

from itertools import pairwise

import cvxpy as cp
import numpy as np
import pytest
import scipy.fft
from convex_reference import dense_operator, tv_operators

from volrecon.models import PSFModel
from volrecon.solvers.admm import solve_admm_window, temporal_eigenvalues


def _window_problem(nz=2, n=10, n_frames=3, seed=4):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:n, :n]
    psf = np.zeros((nz, n, n))
    for z in range(nz):
        for _ in range(3):
            cy, cx = n // 2 + rng.integers(-n // 4, n // 4 + 1, size=2)
            psf[z] += np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * (0.8 + 0.6 * z) ** 2))
    psf /= psf.sum(axis=(1, 2), keepdims=True)
    model = PSFModel.from_stack(psf, 2.0, 1.0)
    truth = np.zeros((nz, n, n), np.float32)
    truth[0, 3, 4] = truth[nz - 1, 6, 6] = 1.0
    frames = np.stack([np.asarray(model.forward(np.roll(truth, t, axis=2)))
                       + 0.05 * rng.standard_normal((n, n)) for t in range(n_frames)])
    return psf, model, frames.astype(np.float32)


def _cvxpy_window(psf, frames, *, tv, l1, temporal):
    """min over v_t ≥ 0 of Σ_t ½‖A v_t − b_t‖² + l1·Σv_t + tv·TV(v_t)
    + temporal·½Σ_t‖v_{t+1} − v_t‖², by cvxpy (Clarabel), with its cost as a numpy function."""
    nz, ny, nx = psf.shape
    a = dense_operator(psf)
    d = tv_operators(nz, ny, nx, 1.0) if tv else []
    n = nz * ny * nx
    v = [cp.Variable(n, nonneg=True) for _ in frames]
    cost = 0
    for vt, bt in zip(v, frames, strict=True):
        cost += 0.5 * cp.sum_squares(a @ vt - bt.ravel()) + l1 * cp.sum(vt)
        if tv:
            cost += tv * cp.sum(cp.norm(cp.vstack([di @ vt for di in d]), 2, axis=0))
    for v0, v1 in pairwise(v):
        cost += 0.5 * temporal * cp.sum_squares(v1 - v0)
    problem = cp.Problem(cp.Minimize(cost))
    problem.solve(solver=cp.CLARABEL)

    def evaluate(volumes):
        x = [np.asarray(vt, np.float64).ravel() for vt in volumes]
        value = 0.0
        for xt, bt in zip(x, frames, strict=True):
            r = a @ xt - bt.ravel().astype(np.float64)
            value += 0.5 * float(r @ r) + l1 * float(xt.sum())
            if tv:
                value += tv * float(np.sqrt((np.stack([di @ xt for di in d]) ** 2)
                                            .sum(axis=0)).sum())
        for x0, x1 in pairwise(x):
            value += 0.5 * temporal * float((x1 - x0) @ (x1 - x0))
        return value

    return float(problem.value), evaluate


@pytest.mark.parametrize(("tv", "l1", "temporal"), [(0.0, 2e-3, 0.5), (2e-3, 1e-3, 0.2),
                                                     (0.0, 2e-3, 0.0)],
                         ids=["l1+temporal", "tv+l1+temporal", "no-prior"])
def test_window_objective_matches_cvxpy(tv, l1, temporal):
    # Reference: cvxpy (Clarabel) on the 4-D problem written independently (dense A, sparse
    # TV differences, the temporal term as explicit differences of the frames' variables).
    psf, model, frames = _window_problem()
    optimum, cost = _cvxpy_window(psf, frames, tv=tv, l1=l1, temporal=temporal)
    volumes, *_ = solve_admm_window(frames, model, iterations=1500, tv=tv, l1=l1, tol=1e-7,
                                    tv_z_weight=1.0, temporal_weight=temporal, init=None)
    gap = (cost(np.asarray(volumes)) - optimum) / optimum
    assert -1e-5 < gap < 1e-4, gap


def test_temporal_eigenvalues_diagonalise_the_neumann_difference():
    # Textbook: DᵀD of the first difference with Neumann ends has eigenvalues 2 − 2cos(πk/W)
    # and the orthonormal DCT-II basis as eigenvectors (Strang, "The discrete cosine
    # transform", SIAM Review 41, 1999).
    n = 6
    d = np.diff(np.eye(n), axis=0)
    basis = scipy.fft.idct(np.eye(n), type=2, axis=0, norm="ortho")  # columns: DCT-II vectors
    np.testing.assert_allclose(basis.T @ (d.T @ d) @ basis, np.diag(temporal_eigenvalues(n)),
                               atol=1e-12)


def test_a_prior_pulls_neighbouring_frames_together():
    # Property: the stronger the prior, the smaller Σ‖v_{t+1} − v_t‖² (each weight's optimum
    # trades data fit for smoothness), and with weight 0 the window equals frame-by-frame.
    _, model, frames = _window_problem()
    spread = []
    for weight in (0.0, 0.5, 5.0):
        volumes, *_ = solve_admm_window(frames, model, iterations=400, tv=0.0, l1=1e-3,
                                        tol=1e-6, tv_z_weight=1.0, temporal_weight=weight,
                                        init=None)
        spread.append(float((np.diff(np.asarray(volumes), axis=0) ** 2).sum()))
    assert spread[0] > spread[1] > spread[2]


def test_windows_break_at_a_cut_and_nowhere_else():
    # Two unrelated bead scenes through a simulated diffuser PSF, a few signal photons per
    # pixel over a background of 2 (Poisson noise dominates frame-to-frame differences), each
    # drifting a pixel per frame: the plan breaks exactly at the cut.
    from volrecon.bench.iteration import problem
    from volrecon.solvers import plan_windows

    rng = np.random.default_rng(11)
    _, model = problem(4, 64, 64, "cpu", 1)
    scenes = [(rng.random(model.shape_in) > 0.998).astype(np.float32) for _ in range(2)]
    scale = 3.0 / float(np.asarray(model.forward(scenes[0])).mean())  # ~3 photons per pixel
    frames = []
    for t in range(12):
        scene = np.roll(scenes[t // 6], t % 6, axis=2) * scale
        frames.append(rng.poisson(np.asarray(model.forward(scene)) + 2.0).astype(np.float32))
    assert plan_windows(np.stack(frames), 8) == [(0, 6), (6, 12)]
