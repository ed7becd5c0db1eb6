"""The fused ADMM steps: compiled (numba) against whole-array code and dense linear algebra."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.backend import get_backend
from volrecon.models import PSFModel
from volrecon.solvers.admm import solve_admm
from volrecon.solvers.admm_steps import ArraySteps, CompiledSteps
from volrecon.solvers.tv import gradient, gradient_adjoint

F32 = np.float32


@pytest.fixture(params=[1, 2], ids=["1thread", "2threads"])
def steps(request):
    be = get_backend("cpu", threads=request.param)
    return ArraySteps(be), CompiledSteps(be)


def _random(rng, shape):
    return rng.standard_normal(shape).astype(F32)


def _complex(rng, shape):
    return (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(np.complex64)


def test_tv_dual_step(rng, steps):
    v, ymb = _random(rng, (5, 12, 10)), _random(rng, (3, 5, 12, 10))
    out = []
    for s in steps:
        m, y = ymb.copy(), np.empty_like(ymb)
        s.tv_dual_step(v, m, y, 0.7, 1.8, 0.5)
        out.append((m, y))
    np.testing.assert_allclose(out[1][0], out[0][0], atol=1e-5)
    np.testing.assert_allclose(out[1][1], out[0][1], atol=1e-5)
    # Definition: y = ρ·shrink(u, κ) with u = ∇v + β = 2∇v − ymb (group soft threshold).
    u = 2 * gradient(v, 0.5) - ymb
    norm = np.sqrt((u**2).sum(axis=0))
    expected = 1.8 * np.where(norm > 0.7, 1 - 0.7 / np.maximum(norm, 1e-30), 0) * u
    np.testing.assert_allclose(out[1][1], expected, atol=1e-5)


@pytest.mark.parametrize("use_tv", [True, False])
def test_w_step(rng, steps, use_tv):
    v, wmg, ymb = _random(rng, (5, 12, 10)), _random(rng, (5, 12, 10)), _random(rng, (3, 5, 12, 10))
    previous = _random(rng, (5, 12, 10))
    out = []
    for s in steps:
        m, w, rhs = wmg.copy(), previous.copy(), np.empty_like(v)
        change, norm = s.w_step(v, m, rhs if use_tv else None, ymb if use_tv else None, w,
                                0.3, 1.8, 2.0, 3.0, 0.5, (7, 6), compare=True)
        # Definition: the change is ‖w − previous w‖², taken before the buffer is overwritten,
        # beside ‖w‖² of the new w.
        np.testing.assert_allclose(change, float(((w - previous) ** 2).sum()), rtol=1e-5)
        np.testing.assert_allclose(norm, float((w**2).sum()), rtol=1e-5)
        out.append((m, w, rhs))
    for got, want in zip(out[1][: 3 if use_tv else 2], out[0], strict=False):
        np.testing.assert_allclose(got, want, atol=1e-5)
    w = out[1][1]
    assert w.min() >= 0 and not w[:, 7:].any() and not w[:, :, 6:].any()
    if use_tv:
        # Definition: rhs = μ₃·wmg + μ₂∇ᵀymb, with the adjoint of solvers.tv.
        np.testing.assert_allclose(out[1][2], 3.0 * out[1][0] + 2.0 * gradient_adjoint(ymb, 0.5),
                                   atol=1e-5)


@pytest.mark.parametrize("tv", [True, False])
def test_volume_solve_matches_dense_solve(rng, steps, tv):
    nz, py, nf = 6, 8, 5
    r, h, xh = _complex(rng, (nz, py, nf)), _complex(rng, (nz, py, nf)), _complex(rng, (py, nf))
    lateral = (4 * rng.random((py, nf))).astype(F32)
    scale, mu1, mu2, mu3 = (1.0, 1.5, 0.7, 0.9) if tv else (3.0, 1.5, 0.0, 0.9)
    e = 0.3 if tv else 0.0
    results = []
    for s in steps:
        rr = r.copy()
        mv = s.volume_solve(rr, h, xh, lateral if tv else None, scale, mu1, mu2, mu3, e)
        results.append((rr, mv))
    np.testing.assert_allclose(results[1][0], results[0][0], atol=1e-5)
    # Reference: numpy.linalg.solve of the dense system (μ₁ a aᴴ + T) ṽ = scale·r + a·x̂ with
    # T = (μ₂L + μ₃)I + e·N, N the Neumann second difference, a = conj(Ĥ), at every frequency.
    neumann = (np.diag([1.0] + [2.0] * (nz - 2) + [1.0]) - np.eye(nz, k=1) - np.eye(nz, k=-1))
    for i in range(py):
        for j in range(nf):
            base = mu2 * lateral[i, j] + mu3 if tv else mu3
            av = h[:, i, j].astype(complex).conj()
            matrix = base * np.eye(nz) + e * neumann + mu1 * np.outer(av, av.conj())
            want = np.linalg.solve(matrix, scale * r[:, i, j] + av * xh[i, j])
            np.testing.assert_allclose(results[1][0][:, i, j], want, rtol=1e-4, atol=1e-5)
            np.testing.assert_allclose(results[1][1][i, j], av.conj() @ want, rtol=1e-4,
                                       atol=1e-5)


def test_norms_and_gradient_minus(rng, steps):
    v, w, wmg = (_random(rng, (4, 9, 11)) for _ in range(3))
    y, yp, ymb = (_random(rng, (3, 4, 9, 11)) for _ in range(3))
    array, compiled = steps
    np.testing.assert_allclose(compiled.w_norms(v, w, wmg), array.w_norms(v, w, wmg), rtol=1e-5)
    np.testing.assert_allclose(compiled.tv_norms(v, y, yp, ymb, 0.5, 1.8),
                               array.tv_norms(v, y, yp, ymb, 0.5, 1.8), rtol=1e-5)
    m1, m2 = ymb.copy(), ymb.copy()
    array.gradient_minus(v, m1, 0.5)
    compiled.gradient_minus(v, m2, 0.5)
    # Definition: p ← ∇v − p with the gradient of solvers.tv.
    np.testing.assert_allclose(m2, gradient(v, 0.5) - ymb, atol=1e-6)
    np.testing.assert_allclose(m2, m1, atol=1e-6)


@pytest.mark.parametrize("tv, l1", [(0.0, 2e-3), (2e-3, 0.0)])
def test_compiled_and_array_solves_agree(rng, tv, l1):
    psf = rng.random((3, 12, 12)) ** 8
    psf /= psf.sum(axis=(1, 2), keepdims=True)
    model = PSFModel.from_stack(psf, 2.0, 1.0)
    truth = np.zeros((3, 12, 12), F32)
    truth[0, 4, 5] = truth[1, 7, 8] = truth[2, 6, 3] = 1.0
    frame = model.forward(truth) + 0.002 * rng.standard_normal((12, 12)).astype(F32)
    runs = [solve_admm(frame, model, iterations=200, tv=tv, l1=l1, tol=1e-5, tv_z_weight=1.0,
                       init=None, compiled=c) for c in (False, True)]
    (v_array, it_array, *_), (v_compiled, it_compiled, *_) = runs
    assert abs(it_array - it_compiled) <= 5
    np.testing.assert_allclose(v_compiled, v_array, atol=1e-4 * float(v_array.max()))


def test_volume_solve_factors_follow_the_penalties(rng, steps):
    # The compiled steps keep factors per penalty set: a change of μ (residual balancing, a
    # window's per-frame μ₃) must never reuse a stale set. Reference: the array steps.
    array, compiled = steps
    nz, py, nf = 5, 6, 4
    r, h, xh = _complex(rng, (nz, py, nf)), _complex(rng, (nz, py, nf)), _complex(rng, (py, nf))
    lateral = (4 * rng.random((py, nf))).astype(F32)
    for mu1, mu2, mu3, e in [(1.0, 0.5, 0.8, 0.2), (2.0, 0.5, 0.8, 0.2), (1.0, 0.5, 0.8, 0.2),
                             (1.0, 0.5, 1.6, 0.2), (1.0, 1.0, 0.8, 0.4)]:
        got, want = r.copy(), r.copy()
        mv = compiled.volume_solve(got, h, xh, lateral, 1.0, mu1, mu2, mu3, e)
        mv_want = array.volume_solve(want, h, xh, lateral, 1.0, mu1, mu2, mu3, e)
        np.testing.assert_allclose(got, want, atol=1e-5)
        np.testing.assert_allclose(mv, mv_want, atol=1e-5)


def test_volume_solve_without_tv_uses_the_given_gain(rng, steps):
    # The gain Σ_z|Ĥ_z|² handed in (ADMM's own) must give what the steps compute themselves;
    # reference: the array steps, which never use it.
    array, compiled = steps
    nz, py, nf = 4, 6, 5
    r, h, xh = _complex(rng, (nz, py, nf)), _complex(rng, (nz, py, nf)), _complex(rng, (py, nf))
    gain = (np.abs(h.astype(np.complex128)) ** 2).sum(axis=0).astype(F32)
    got, want = r.copy(), r.copy()
    mv = compiled.volume_solve(got, h, xh, None, 2.0, 1.5, 0.0, 0.9, 0.0, gain=gain)
    mv_want = array.volume_solve(want, h, xh, None, 2.0, 1.5, 0.0, 0.9, 0.0)
    np.testing.assert_allclose(got, want, atol=1e-5)
    np.testing.assert_allclose(mv, mv_want, atol=1e-5)


@pytest.mark.parametrize("inverse", [False, True])
@pytest.mark.parametrize("shape", [(8, 3, 6, 10), (5, 7, 9), (2, 1, 4, 3)])
def test_window_dct_matches_scipy(rng, steps, inverse, shape):
    import scipy.fft

    a = _random(rng, shape)
    # Reference: scipy's orthonormal DCT-II (and its inverse) along the window axis.
    want = (scipy.fft.idct if inverse else scipy.fft.dct)(a.astype(np.float64), type=2, axis=0,
                                                           norm="ortho")
    for s in steps:
        out = np.empty_like(a)
        got = s.window_dct(a, out, inverse=inverse)
        assert got is out
        np.testing.assert_allclose(out, want, atol=1e-5)
        in_place = a.copy()
        s.window_dct(in_place, in_place, inverse=inverse)
        np.testing.assert_allclose(in_place, want, atol=1e-5)


def test_window_dct_round_trip_is_exact_to_rounding(rng, steps):
    a = _random(rng, (8, 4, 5, 6))
    for s in steps:
        back = s.window_dct(s.window_dct(a, np.empty_like(a)), np.empty_like(a), inverse=True)
        np.testing.assert_allclose(back, a, atol=1e-5)


@pytest.mark.parametrize("n_frames", [8, 7])
def test_window_dct_bits_do_not_depend_on_the_thread_split(rng, n_frames):
    # A window of 8 frames has its own kernel (the matrix in registers), others the general
    # one; each element is one fixed sum, so the threads' share of the rows must not change
    # a bit. Reference for the values: scipy's orthonormal DCT-II.
    import scipy.fft

    a = _random(rng, (n_frames, 3, 37, 21))
    want = scipy.fft.dct(a.astype(np.float64), type=2, axis=0, norm="ortho")
    outs = []
    for threads in (1, 2):
        s = CompiledSteps(get_backend("cpu", threads=threads))
        out = s.window_dct(a, np.empty_like(a))
        np.testing.assert_allclose(out, want, atol=1e-5)
        outs.append(out)
    np.testing.assert_array_equal(outs[0], outs[1])
