"""TV value, gradient and proximal map against sparse matrices, numpy and cvxpy."""

from __future__ import annotations

import numpy as np
import pytest
from convex_reference import cvxpy_tv_prox, textbook_tv, tv_operators

from volrecon.solvers.tv import gradient, gradient_adjoint, tv_prox, tv_value


@pytest.mark.parametrize("shape_zyx", [(1, 5, 6), (3, 5, 6), (4, 6, 5)])
@pytest.mark.parametrize("z_weight", [1.0, 0.7, 2.5])
def test_tv_value_matches_sparse_definition(rng, shape_zyx, z_weight):
    v = rng.random(shape_zyx)
    d = tv_operators(*shape_zyx, z_weight)
    g = np.stack([di @ v.ravel() for di in d])
    # Reference: the sparse-matrix TV used for the cvxpy problems, and the same definition
    # written with numpy.roll; float64 throughout, so agreement to rounding.
    np.testing.assert_allclose(tv_value(v, z_weight), np.sqrt((g**2).sum(0)).sum(), rtol=1e-10)
    np.testing.assert_allclose(tv_value(v, z_weight), textbook_tv(v, z_weight), rtol=1e-10)


@pytest.mark.parametrize("shape_zyx", [(1, 7, 6), (3, 6, 7)])
@pytest.mark.parametrize("z_weight", [1.0, 0.4])
def test_gradient_adjoint_is_the_transpose(rng, shape_zyx, z_weight):
    v = rng.standard_normal(shape_zyx)
    p = rng.standard_normal((3, *shape_zyx))
    # Definition of the adjoint: <∇v, p> = <v, ∇ᵀp> (dot test, float64 rounding).
    lhs = float((gradient(v, z_weight) * p).sum())
    rhs = float((v * gradient_adjoint(p, z_weight)).sum())
    assert lhs == pytest.approx(rhs, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize(("shape_zyx", "z_weight", "nonnegative"), [
    ((3, 6, 7), 1.0, True),
    ((3, 6, 7), 0.4, True),
    ((4, 5, 6), 2.0, False),
    ((1, 7, 8), 1.0, True),
    ((1, 7, 8), 3.0, False),
], ids=["cube", "z-weight-0.4", "z-weight-2-signed", "Z1", "Z1-z-weight-3-signed"])
def test_tv_prox_matches_cvxpy(rng, shape_zyx, z_weight, nonnegative):
    z = 0.5 * rng.standard_normal(shape_zyx) + 0.3
    weight = 0.15
    # Reference: cvxpy (Clarabel) on argmin ½‖u − z‖² + weight·TV(u) [+ u ≥ 0] with the
    # sparse difference matrices of the documented TV (isotropic: one 2-norm per voxel over
    # the y, x and weighted z differences).
    optimum, expected, cost = cvxpy_tv_prox(z, weight, z_weight, nonnegative=nonnegative)
    got, _dual = tv_prox(z, weight, z_weight, iterations=1000, nonnegative=nonnegative)
    # The weight is large enough to matter: the prox moves z by much more than the tolerance.
    assert np.abs(expected - z).max() > 0.3
    # Measured after 1000 dual iterations: ≤ 2e-5 from the cvxpy minimiser and a relative
    # cost gap ≤ 2e-6 (the slowest case is Z = 1 with w_z = 3, whose step still allows for
    # depth differences). 1e-4 and 2e-5 leave a margin of 5 to 10.
    np.testing.assert_allclose(got, expected, atol=1e-4)
    assert abs(cost(got) - optimum) <= 2e-5 * optimum
    if nonnegative:
        assert got.min() >= 0


def test_tv_prox_warm_start_continues(rng):
    z = 0.5 * rng.standard_normal((3, 6, 7)) + 0.3
    _, expected, _ = cvxpy_tv_prox(z, 0.15, 1.0, nonnegative=True)
    first, dual = tv_prox(z, 0.15, 1.0, iterations=20)
    resumed, _ = tv_prox(z, 0.15, 1.0, iterations=20, dual=dual)
    # Reference: the cvxpy minimiser. Handing the dual back resumes the iteration instead of
    # starting over, so 20 more iterations get closer to the optimum (measured on three
    # seeds: the distance falls by a factor of 3 to 30, here from 6.6e-3 to 2.0e-3).
    first_error = np.abs(first - expected).max()
    assert np.abs(resumed - expected).max() < 0.5 * first_error
