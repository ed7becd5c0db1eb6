"""ADMM with an exact Fourier-domain volume update for shift-invariant PSF models.

Problem: ``min_v ½‖C M v − b‖² + l1·Σv + tv·TV(v)`` subject to ``v ≥ 0`` and ``v = 0``
outside the reconstructed field, where ``M`` is circular convolution on the zero-padded grid
(the model's transfer functions) and ``C`` crops to the sensor.

Splits (scaled form, Boyd et al. 2011): ``x = M v`` (padded sensor plane), ``y = ∇v``
(3-D forward differences, only when tv > 0), ``w = v`` (carries support and non-negativity)::

    x ← (Cᵀb + μ₁(Mv + α)) / (CᵀC + μ₁)
    y ← shrink(∇v + β, tv/μ₂)                  group (isotropic) shrinkage
    w ← Π_{support, ≥0}(v + γ − l1/μ₃)
    v ← (μ₁MᵀM + μ₂∇ᵀ∇ + μ₃I)⁻¹ [μ₁Mᵀ(x − α) + μ₂∇ᵀ(y − β) + μ₃(w − γ)]
    α += Mv − x;  β += ∇v − y;  γ += v − w

The v-update is exact: in the lateral DFT the depth coupling ``MᵀM`` is ``a aᴴ`` with
``a = conj(Ĥ(f)) ∈ ℂ^Z`` per frequency, the lateral TV Laplacian is the scalar
``L(f) = |1−e^{−2πi f_y}|² + |1−e^{−2πi f_x}|²`` and an orthonormal DCT-II ``Q`` along z
diagonalises the Neumann depth Laplacian (``λ_k = w_z²(2 − 2cos(πk/Z))``). With ``ã = Q a`` and
``d = μ₂(L + λ_k) + μ₃`` Sherman–Morrison gives, per frequency in O(Z)::

    Ṽ = R̃/d − (ã/d) · μ₁ ãᴴ(R̃/d) / (1 + μ₁ ãᴴ(ã/d)),    (M v)^ = ãᴴ(R̃/d) / (1 + μ₁ ãᴴ(ã/d))

One iteration costs Z forward and Z inverse real 2-D FFTs plus two single-plane ones: the
same transforms one application of A and Aᵀ need.

The penalties adapt by residual balancing (Boyd §3.4.1, with residuals normalised as in
Wohlberg 2017); scaled duals are rescaled when a penalty changes. The solve stops when the
normalised primal and dual residuals both fall below `tol`.

References
----------
S. Boyd, N. Parikh, E. Chu, B. Peleato, J. Eckstein, "Distributed optimization and statistical
learning via the alternating direction method of multipliers", Found. Trends Mach. Learn. 3 (2011).
B. Wohlberg, "ADMM penalty parameter selection by residual balancing", arXiv:1704.06209 (2017).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.solvers.info import SolverState
from volrecon.solvers.tv import gradient, gradient_adjoint

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.backend import Backend
    from volrecon.models.base import PSFModel

__all__ = ["solve_admm"]

#: Residual balancing: change a penalty when one residual exceeds the other this many times.
BALANCE_RATIO = 5.0
BALANCE_FACTOR = 2.0
#: Over-relaxation ρ (Boyd §3.4.3); 1.8 cut the iterations to a 1 % objective gap 2–4× on
#: simulated diffuser data with TV, and helped the l1-only case less but still.
RELAXATION = 1.8
INITIAL_MU1 = 1.0
INITIAL_MU2 = 1.0
INITIAL_MU3 = 1.0


@dataclass
class _Factor:
    """Per-frequency quantities of the v-solve for the current penalties."""

    inv_d: Any  # (Z, Py, Fx) real, or a scalar when tv == 0
    a_over_d: Any  # (Z, Py, Fx) complex
    gain: Any  # (Py, Fx) real: 1 / (1 + μ₁ ãᴴ(ã/d))


class _Problem:
    """Constants of one solve: spectra, masks, Laplacian eigenvalues, on one backend."""

    def __init__(self, model: PSFModel, frame: Array, tv: float, tv_z_weight: float) -> None:
        be: Backend = model.backend
        xp = be.xp
        self.be, self.xp = be, xp
        self.shape = model.padded_shape
        self.nz = model.n_planes
        self.ny, self.nx = model.shape_out
        self.dtype = model.dtype
        self.use_tv = tv > 0
        self.z_weight = tv_z_weight
        spectra = model.transfer_functions()
        if spectra is None:
            raise ValueError("ADMM needs a model with transfer functions")
        a = spectra.conj()
        if self.use_tv:
            # Orthonormal DCT-II along depth as a Z×Z matrix: for the Z of PSF stacks (≤ 64)
            # one BLAS product beats a strided DCT (measured 2.3 ms vs 0.35 ms at Z = 16).
            import scipy.fft

            q = scipy.fft.dct(np.eye(self.nz), type=2, axis=0, norm="ortho")
            self.q = xp.asarray(q.astype(self.dtype))
            self.q_inverse = xp.ascontiguousarray(self.q.T)
        self.a_t = self.depth_transform(a) if self.use_tv else a  # ã = Q conj(Ĥ)
        self.a_t_conj = self.a_t.conj()
        self.a_abs2 = (self.a_t.real**2 + self.a_t.imag**2).astype(self.dtype)
        # Σ_z |Ĥ_z(f)|² weighted for the half spectrum: ‖Mᵀx‖² = Σ_f wgt·S(f)|X̂|² / (Py Px)
        py, px = self.shape
        fx = px // 2 + 1
        half = np.full(fx, 2.0)
        half[0] = 1.0
        if px % 2 == 0:
            half[-1] = 1.0
        self.half_weight = xp.asarray((half / (py * px)).astype(self.dtype))
        self.sum_abs2 = self.a_abs2.sum(axis=0)
        if self.use_tv:
            ky = np.fft.fftfreq(py)[:, None]
            kx = np.fft.rfftfreq(px)[None, :]
            lateral = (2 - 2 * np.cos(2 * np.pi * ky)) + (2 - 2 * np.cos(2 * np.pi * kx))
            depth = tv_z_weight**2 * (2 - 2 * np.cos(np.pi * np.arange(self.nz) / self.nz))
            self.laplacian = xp.asarray(
                (lateral[None] + depth[:, None, None]).astype(self.dtype))
        self.sensor = (slice(0, self.ny), slice(0, self.nx))
        self.b_padded = xp.zeros(self.shape, dtype=self.dtype)
        self.b_padded[self.sensor] = frame

    def depth_transform(self, a: Array, *, inverse: bool = False) -> Array:
        """Apply Q (or Qᵀ) along depth to a complex (Z, Py, Fx) array."""
        xp = self.xp
        a = xp.ascontiguousarray(a)
        out = xp.empty_like(a)
        real = a.real.dtype
        xp.matmul(self.q_inverse if inverse else self.q, a.view(real).reshape(self.nz, -1),
                  out=out.view(real).reshape(self.nz, -1))
        return out

    def factor(self, mu: tuple[float, float, float]) -> _Factor:
        mu1, mu2, mu3 = mu
        if self.use_tv:
            inv_d = (1.0 / (mu2 * self.laplacian + mu3)).astype(self.dtype)
            q = (self.a_abs2 * inv_d).sum(axis=0)
        else:
            inv_d = self.dtype.type(1.0 / mu3)
            q = self.sum_abs2 * inv_d
        gain = (1.0 / (1.0 + mu1 * q)).astype(self.dtype)
        return _Factor(inv_d, self.a_t * inv_d, gain)

    def norm_mt(self, x_hat: Array) -> float:
        """‖Mᵀx‖ from the half spectrum of x, by Parseval."""
        energy = (self.half_weight * self.sum_abs2 * (x_hat.real**2 + x_hat.imag**2)).sum()
        return math.sqrt(max(float(energy), 0.0))


def _norm(xp: Any, a: Array) -> float:
    return math.sqrt(float(xp.vdot(a.ravel(), a.ravel()).real))


def solve_admm(frame: Array, model: PSFModel, *, iterations: int, tv: float, l1: float,
               tol: float, tv_z_weight: float, init: Array | SolverState | None,
               check_every: int = 5,
               ) -> tuple[Array, int, bool, SolverState, dict[str, list[float]]]:
    """Run ADMM on one frame; returns (volume on the sensor grid, iterations, converged,
    state for a warm start, history). `frame` and `init` are already on the model's backend."""
    p = _Problem(model, frame, tv, tv_z_weight)
    be, xp = p.be, p.xp
    shape, dt = p.shape, p.dtype
    nz, ny, nx = p.nz, p.ny, p.nx
    sensor = p.sensor

    mean_gain = float(p.sum_abs2.mean())
    scale = mean_gain if mean_gain > 0 else 1.0
    mu = [INITIAL_MU1, INITIAL_MU2 * scale if p.use_tv else 0.0, INITIAL_MU3 * scale]
    v = xp.zeros((nz, *shape), dtype=dt)
    alpha = xp.zeros(shape, dtype=dt)
    gamma = xp.zeros((nz, *shape), dtype=dt)
    beta: Any = xp.zeros((3, nz, *shape), dtype=dt) if p.use_tv else None
    if isinstance(init, SolverState):
        v[...] = init.arrays["v"]
        alpha[...] = init.arrays["alpha"]
        gamma[...] = init.arrays["gamma"]
        if p.use_tv and "beta" in init.arrays:
            beta[...] = init.arrays["beta"]
        mu = list(init.penalties)
        if not p.use_tv:
            mu[1] = 0.0
        elif mu[1] == 0.0:
            mu[1] = scale
    elif init is not None:
        v[:, :ny, :nx] = init
    fac = p.factor(tuple(mu))  # type: ignore[arg-type]

    # Mv and ∇v for the current v.
    v_hat = be.rfft2(v, shape)
    mv = be.irfft2((v_hat * p.a_t_conj if not p.use_tv else p.depth_transform(v_hat) * p.a_t_conj
                    ).sum(axis=0), shape).astype(dt, copy=False)
    del v_hat
    grad_v: Any = gradient(v, tv_z_weight) if p.use_tv else None
    y: Any = xp.empty_like(beta) if p.use_tv else None
    y_minus_beta: Any = xp.empty_like(beta) if p.use_tv else None
    y_norm: Any = xp.empty((nz, *shape), dtype=dt) if p.use_tv else None
    tv_rhs: Any = xp.empty((nz, *shape), dtype=dt) if p.use_tv else None
    y_old: Any = None
    x_denominator = xp.full(shape, 1.0 / mu[0], dtype=dt)
    x_denominator[sensor] = 1.0 / (1.0 + mu[0])
    x = xp.empty(shape, dtype=dt)
    w = xp.empty_like(v)
    rhs = xp.empty_like(v)
    x_minus_alpha = xp.empty(shape, dtype=dt)  # relaxed x minus α, then α = Mv − this
    w_minus_gamma = xp.empty_like(v)
    rho = dt.type(RELAXATION)
    history: dict[str, list[float]] = {"iteration": [], "primal": [], "dual": [],
                                       "mu1": [], "mu2": [], "mu3": []}
    converged = False
    it = 0
    for it in range(1, iterations + 1):
        check = it % check_every == 0 or it == iterations
        if check:
            x_old, w_old = x.copy(), w.copy()
            y_old = y.copy() if p.use_tv else None
        # x-update (element-wise, crop-aware least squares)
        xp.add(mv, alpha, out=x)
        x *= mu[0]
        x += p.b_padded
        x *= x_denominator
        # y-update (isotropic group shrinkage)
        if p.use_tv:
            xp.add(grad_v, beta, out=y)
            _sum_of_squares(xp, y, out=y_norm)
            xp.sqrt(y_norm, out=y_norm)
            kappa = dt.type(tv / mu[1])
            xp.maximum(y_norm, kappa, out=y_norm)
            xp.divide(kappa, y_norm, out=y_norm)
            xp.subtract(dt.type(1), y_norm, out=y_norm)
            y_norm *= rho  # y holds ρ·shrink(...): the relaxed point needs only ρy
            y *= y_norm
        # w-update (non-negative soft threshold on the support)
        xp.add(v, gamma, out=w)
        if l1 > 0:
            w -= l1 / mu[2]
        xp.maximum(w, 0, out=w)
        w[:, ny:, :] = 0
        w[:, :ny, nx:] = 0
        # relaxed points ẑ = ρz + (1 − ρ)·(A v) minus the duals
        xp.multiply(mv, 1 - rho, out=x_minus_alpha)
        x_minus_alpha += rho * x
        x_minus_alpha -= alpha
        xp.multiply(v, 1 - rho, out=w_minus_gamma)
        w_minus_gamma -= gamma
        xp.multiply(w, rho, out=rhs)
        w_minus_gamma += rhs
        # v-update: right-hand side r = μ₁Mᵀ(x̂ − α) + μ₂∇ᵀ(ŷ − β) + μ₃(ŵ − γ)
        xp.multiply(w_minus_gamma, mu[2], out=rhs)
        if p.use_tv:
            xp.multiply(grad_v, 1 - rho, out=y_minus_beta)
            y_minus_beta -= beta
            y_minus_beta += y
            gradient_adjoint(y_minus_beta, tv_z_weight, out=tv_rhs)
            tv_rhs *= mu[1]
            rhs += tv_rhs
        r_hat = be.rfft2(rhs, shape)
        if p.use_tv:
            r_hat = p.depth_transform(r_hat)
        x_hat = be.rfft2(x_minus_alpha, shape)
        x_hat *= mu[0]
        r_hat += p.a_t * x_hat  # μ₁ ã X̂ (ã broadcast over depth)
        r_hat *= fac.inv_d
        s = (p.a_t_conj * r_hat).sum(axis=0)
        s *= fac.gain
        mv_hat = s  # (M v)^ = ãᴴ(R̃/d) / (1 + μ₁ ãᴴ(ã/d))
        r_hat -= fac.a_over_d * (mu[0] * s)
        if p.use_tv:
            r_hat = p.depth_transform(r_hat, inverse=True)
        v = be.irfft2(r_hat, shape).astype(dt, copy=False)
        del r_hat
        mv = be.irfft2(mv_hat, shape).astype(dt, copy=False)
        # dual updates: α + Mv − x̂ = Mv − (x̂ − α), and alike
        xp.subtract(mv, x_minus_alpha, out=alpha)
        xp.subtract(v, w_minus_gamma, out=gamma)
        if p.use_tv:
            grad_v = gradient(v, tv_z_weight, out=grad_v)
            xp.subtract(grad_v, y_minus_beta, out=beta)
        if not check:
            continue
        # residuals, normalised (Wohlberg 2017 §II)
        r1 = _norm(xp, mv - x)
        r3 = _norm(xp, v - w)
        s1 = mu[0] * p.norm_mt(be.rfft2(x - x_old, shape))
        s3 = mu[2] * _norm(xp, w - w_old)
        primal_ref = [max(_norm(xp, mv), _norm(xp, x)), max(_norm(xp, v), _norm(xp, w))]
        dual_ref = [mu[0] * p.norm_mt(be.rfft2(alpha, shape)), mu[2] * _norm(xp, gamma)]
        rs, ss = [r1, r3], [s1, s3]
        if p.use_tv:
            # y holds ρ·y (see the y-update)
            rs.append(_norm(xp, grad_v - y / rho))
            ss.append(mu[1] / rho * _norm(xp, gradient_adjoint(y - y_old, tv_z_weight)))
            primal_ref.append(max(_norm(xp, grad_v), _norm(xp, y) / rho))
            dual_ref.append(mu[1] * _norm(xp, gradient_adjoint(beta, tv_z_weight)))
        tiny = 1e-30
        primal = math.hypot(*rs) / max(math.hypot(*primal_ref), tiny)
        dual = math.hypot(*ss) / max(math.hypot(*dual_ref), tiny)
        history["iteration"].append(it)
        history["primal"].append(primal)
        history["dual"].append(dual)
        for k in range(3):
            history[f"mu{k + 1}"].append(mu[k])
        if primal < tol and dual < tol:
            converged = True
            break
        if it == iterations:
            break
        # residual balancing per split: index in rs/ss → penalty index
        changed = False
        for j, k in enumerate([0, 2, 1][: len(rs)]):
            rn = rs[j] / max(primal_ref[j], tiny)
            sn = ss[j] / max(dual_ref[j], tiny)
            if rn > BALANCE_RATIO * sn:
                mu[k] *= BALANCE_FACTOR
                _rescale_dual(k, 1.0 / BALANCE_FACTOR, alpha, beta, gamma)
                changed = True
            elif sn > BALANCE_RATIO * rn:
                mu[k] /= BALANCE_FACTOR
                _rescale_dual(k, BALANCE_FACTOR, alpha, beta, gamma)
                changed = True
        if changed:
            fac = p.factor(tuple(mu))  # type: ignore[arg-type]
            x_denominator[...] = 1.0 / mu[0]
            x_denominator[sensor] = 1.0 / (1.0 + mu[0])

    arrays = {"v": v, "alpha": alpha, "gamma": gamma}
    if p.use_tv:
        arrays["beta"] = beta
    state = SolverState("admm", arrays, tuple(mu))
    # The returned volume is the feasible split w (≥ 0, zero off the field).
    volume = xp.ascontiguousarray(w[:, :ny, :nx])
    return volume, it, converged, state, history


def _sum_of_squares(xp: Any, y: Array, *, out: Array) -> None:
    """``out = Σ_c y[c]²`` in one pass where the backend allows it."""
    if xp is np:
        np.einsum("i...,i...->...", y, y, out=out)
    else:
        out[...] = (y * y).sum(axis=0)


def _rescale_dual(k: int, factor: float, alpha: Array, beta: Array | None, gamma: Array) -> None:
    if k == 0:
        alpha *= factor
    elif k == 1 and beta is not None:
        beta *= factor
    else:
        gamma *= factor
