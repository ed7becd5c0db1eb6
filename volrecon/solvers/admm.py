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

The code runs the over-relaxed form of these updates (Boyd §3.4.3, ρ = ``RELAXATION``):
after the x-, y- and w-updates each split is replaced by its relaxed value before the
v-update and the dual updates use it too::

    x̂ = ρx + (1 − ρ)Mv;   ŷ = ρy + (1 − ρ)∇v;   ŵ = ρw + (1 − ρ)v
    v ← (μ₁MᵀM + μ₂∇ᵀ∇ + μ₃I)⁻¹ [μ₁Mᵀ(x̂ − α) + μ₂∇ᵀ(ŷ − β) + μ₃(ŵ − γ)]
    α += Mv − x̂;  β += ∇v − ŷ;  γ += v − ŵ

(the duals are carried implicitly as ``v − γ`` and ``∇v − β``, see
:mod:`volrecon.solvers.admm_steps`).

The v-update is exact: in the lateral DFT the depth coupling ``MᵀM`` is ``a aᴴ`` with
``a = conj(Ĥ(f)) ∈ ℂ^Z`` per frequency, the lateral TV Laplacian is the scalar
``L(f) = |1−e^{−2πi f_y}|² + |1−e^{−2πi f_x}|²`` and the depth one the Neumann second
difference ``N`` (tridiagonal). With ``T = (μ₂L + μ₃)I + μ₂w_z²N``, a Thomas sweep along z and
Sherman–Morrison give, per frequency in O(Z)::

    Ṽ = T⁻¹R − T⁻¹a · μ₁ aᴴT⁻¹R / (1 + μ₁ aᴴT⁻¹a),    (M v)^ = aᴴT⁻¹R / (1 + μ₁ aᴴT⁻¹a)

One iteration costs Z forward and Z inverse real 2-D FFTs plus two single-plane ones: the
same transforms one application of A and Aᵀ need. Everything else is a few fused passes
(:mod:`volrecon.solvers.admm_steps`): the tridiagonal solve needs no stored factorisation and
no transform along depth (an orthonormal DCT-II diagonalises N too, but costs two Z×Z
products over the whole spectrum per iteration).

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
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.solvers.admm_steps import steps_for
from volrecon.solvers.info import SolverState
from volrecon.solvers.norms import squared_norm

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.backend import Backend
    from volrecon.models.base import PSFModel

__all__ = ["solve_admm", "solve_admm_window", "temporal_eigenvalues"]

#: Residual balancing: change a penalty when one residual exceeds the other this many times.
BALANCE_RATIO = 5.0
BALANCE_FACTOR = 2.0
#: Over-relaxation ρ (Boyd §3.4.3); 1.8 cut the iterations to a 1 % objective gap 2–4× on
#: simulated diffuser data with TV, and helped the l1-only case less but still.
RELAXATION = 1.8
INITIAL_MU1 = 1.0
INITIAL_MU2 = 1.0
INITIAL_MU3 = 1.0


class _Problem:
    """Constants of one solve: spectra, the lateral Laplacian, the frames, on one backend.

    What depends on the model alone (Ĥ, Σ_z|Ĥ_z|², the Laplacian) is the model's, computed by
    its first ADMM solve and kept (:meth:`PSFModel.solver_cache`): a low-rank model builds its
    Z spectra once, not once per frame."""

    def __init__(self, model: PSFModel, frames: Array, tv: float) -> None:
        be: Backend = model.backend
        xp = be.xp
        self.be, self.xp = be, xp
        self.shape = model.padded_shape
        self.n_frames = int(frames.shape[0])
        self.nz = model.n_planes
        self.ny, self.nx = model.shape_out
        self.dtype = model.dtype
        self.use_tv = tv > 0
        # Ĥ is used as given (a = conj(Ĥ) is formed inside the steps)
        self.h, self.half_weight, self.sum_abs2 = model.solver_cache(
            "admm-spectra", lambda: _spectra_constants(model))
        self.lateral: Any = model.solver_cache(
            "admm-lateral", lambda: _lateral_laplacian(model)) if self.use_tv else None
        self.sensor = (slice(None), slice(0, self.ny), slice(0, self.nx))
        self.b_padded = xp.zeros((self.n_frames, *self.shape), dtype=self.dtype)
        self.b_padded[self.sensor] = frames

    def norm_mt(self, x_hat: Array) -> float:
        """‖Mᵀx‖ from the half spectrum of x (one or several frames), by Parseval."""
        energy = (self.half_weight * self.sum_abs2 * (x_hat.real**2 + x_hat.imag**2)).sum()
        return math.sqrt(max(float(energy), 0.0))


def _spectra_constants(model: PSFModel) -> tuple[Array, Array, Array]:
    """Ĥ, the half-spectrum weights and ``Σ_z |Ĥ_z(f)|²`` of a model, on its backend."""
    xp = model.backend.xp
    spectra = model.transfer_functions()
    if spectra is None:
        raise ValueError("ADMM needs a model with transfer functions")
    # ‖Mᵀx‖² = Σ_f wgt·S(f)|X̂|² / (Py Px) over the half spectrum
    py, px = model.padded_shape
    half = np.full(px // 2 + 1, 2.0)
    half[0] = 1.0
    if px % 2 == 0:
        half[-1] = 1.0
    half_weight = xp.asarray((half / (py * px)).astype(model.dtype))
    sum_abs2 = xp.zeros(spectra.shape[1:], dtype=model.dtype)
    for plane in spectra:  # one plane at a time: no Z-sized temporaries
        sum_abs2 += plane.real**2 + plane.imag**2
    return spectra, half_weight, sum_abs2


def _lateral_laplacian(model: PSFModel) -> Array:
    """``L(f) = |1−e^{−2πi f_y}|² + |1−e^{−2πi f_x}|²`` on the padded half spectrum."""
    py, px = model.padded_shape
    ky = np.fft.fftfreq(py)[:, None]
    kx = np.fft.rfftfreq(px)[None, :]
    lateral = (2 - 2 * np.cos(2 * np.pi * ky)) + (2 - 2 * np.cos(2 * np.pi * kx))
    return model.backend.xp.asarray(lateral.astype(model.dtype))


def _forward_padded(p: _Problem, v: Array, planes: int = 8) -> Array:
    """M v on the padded grid for (W, Z, Py, Px) volumes, a few planes at a time."""
    be = p.be
    out = p.xp.empty((v.shape[0], *p.shape), dtype=p.dtype)
    for t in range(v.shape[0]):
        mv_hat = p.xp.zeros(p.h.shape[1:], dtype=p.h.dtype)
        for z0 in range(0, p.nz, planes):
            mv_hat += (be.rfft2(v[t, z0 : z0 + planes], p.shape)
                       * p.h[z0 : z0 + planes]).sum(axis=0)
        out[t] = be.irfft2(mv_hat, p.shape)
    return out


def _norm(xp: Any, a: Array) -> float:
    return math.sqrt(squared_norm(a))


def temporal_eigenvalues(n_frames: int) -> np.ndarray:
    """Eigenvalues ``2 − 2cos(πk/W)`` of DᵀD, D the first difference along a window of W
    frames with Neumann ends; its eigenvectors are the orthonormal DCT-II basis."""
    return 2.0 - 2.0 * np.cos(np.pi * np.arange(n_frames) / n_frames)


def solve_admm(frame: Array, model: PSFModel, *, iterations: int, tv: float, l1: float,
               tol: float, tv_z_weight: float, init: Array | SolverState | None,
               stop_change: float = 0.0, check_every: int = 5, compiled: bool | None = None,
               ) -> tuple[Array, int, bool, SolverState, dict[str, list[float]]]:
    """Run ADMM on one frame; returns (volume on the sensor grid, iterations, converged,
    state for a warm start, history). `frame` and `init` are already on the model's backend.

    Stops when the normalised residuals meet `tol` (checked every `check_every` iterations)
    or, with ``stop_change > 0``, after the first iteration from the third on whose relative
    change of the volume ``c_k = ‖w_k − w_{k−1}‖ / ‖w_k‖`` is at most `stop_change` and
    smaller than ``c_{k−1}`` (measured in the fused w-step, so at no extra pass). `compiled`
    picks the step implementation (default: numba on the CPU, arrays on the GPU). One frame
    is a window of one (:func:`solve_admm_window` without a temporal prior)."""
    start = init
    if isinstance(init, SolverState):
        start = SolverState(init.method, {k: a[None] for k, a in init.arrays.items()},
                            init.penalties)
    elif init is not None:
        start = init[None]
    volumes, it, converged, state, history = solve_admm_window(
        frame[None], model, iterations=iterations, tv=tv, l1=l1, tol=tol,
        tv_z_weight=tv_z_weight, temporal_weight=0.0, init=start, stop_change=stop_change,
        check_every=check_every, compiled=compiled)
    single = SolverState("admm", {k: a[0] for k, a in state.arrays.items()}, state.penalties)
    return volumes[0], it, converged, single, history


def solve_admm_window(frames: Array, model: PSFModel, *, iterations: int, tv: float,
                      l1: float, tol: float, tv_z_weight: float, temporal_weight: float,
                      init: Array | SolverState | None, stop_change: float = 0.0,
                      check_every: int = 5, compiled: bool | None = None,
                      ) -> tuple[Array, int, bool, SolverState, dict[str, list[float]]]:
    """Run ADMM on a window of W consecutive frames ``(W, Y, X)`` solved together.

    The objective is the sum of the frames' objectives plus
    ``temporal_weight · ½ Σ_t ‖v_{t+1} − v_t‖²`` (Neumann ends: the window's first and last
    frames have one neighbour). The quadratic temporal term joins the exact v-update: an
    orthonormal DCT-II along the window diagonalises DᵀD (eigenvalues
    :func:`temporal_eigenvalues`), so temporal frequency k solves today's per-frame system with
    ``μ₃ + temporal_weight·λ_k`` in place of μ₃ — two small real transforms along the window per
    iteration beside the 2-D FFTs. Penalties are shared by the window; residuals and the
    relative change are taken over all its frames. Returns volumes ``(W, Z, Y, X)`` and a
    state with a leading window axis; `init` is the state of the window before (its last
    frame starts every frame of this one) or volumes ``(W, Z, Y, X)``.
    """
    n_frames = int(frames.shape[0])
    p = _Problem(model, frames, tv)
    be, xp = p.be, p.xp
    # The model's steps object keeps the volume-solve factors of its penalties (with TV):
    # a warm chain's next frame starts from the same penalties and reuses them.
    steps = model.solver_cache(("admm-steps", compiled),
                               lambda: steps_for(be, compiled=compiled))
    shape, dt = p.shape, p.dtype
    nz, ny, nx = p.nz, p.ny, p.nx
    sensor = p.sensor
    temporal = temporal_weight > 0 and n_frames > 1
    shifts = (temporal_weight * temporal_eigenvalues(n_frames)).tolist() if temporal \
        else [0.0] * n_frames

    def window(a: Array) -> Array:  # the last frame of the state before, for every frame
        if n_frames == 1:
            return a[-1:].astype(dt, copy=True)
        return xp.repeat(a[-1:].astype(dt, copy=False), n_frames, axis=0)

    mean_gain = float(p.sum_abs2.mean())
    scale = mean_gain if mean_gain > 0 else 1.0
    mu = [INITIAL_MU1, INITIAL_MU2 * scale if p.use_tv else 0.0, INITIAL_MU3 * scale]
    # Implicit scaled duals: wmg = v − γ and ymb = ∇v − β (see admm_steps), carried in the
    # state as they are: a warm start needs no pass to turn them into γ and β and back.
    wmg: Any = None
    ymb: Any = None
    mv: Any = None
    if isinstance(init, SolverState):
        v = window(init.arrays["v"])
        alpha = window(init.arrays["alpha"])
        wmg = window(init.arrays["wmg"])
        if p.use_tv and "ymb" in init.arrays:
            ymb = window(init.arrays["ymb"])
            made_with = float(init.arrays["tv_z_weight"][-1])
            if made_with != tv_z_weight:  # keep β = ∇v − ymb, with ∇'s depth weight changed
                for t in range(n_frames):
                    steps.gradient_minus(v[t], ymb[t], made_with)  # ymb → β
                    steps.gradient_minus(v[t], ymb[t], tv_z_weight)  # β → ymb
        if "mv" in init.arrays:  # M v of the start, the last of the solve before
            mv = window(init.arrays["mv"])
        mu = list(init.penalties)
        if not p.use_tv:
            mu[1] = 0.0
        elif mu[1] == 0.0:
            mu[1] = scale
    else:
        v = xp.zeros((n_frames, nz, *shape), dtype=dt)
        alpha = xp.zeros((n_frames, *shape), dtype=dt)
        if init is not None:
            v[:, :, :ny, :nx] = init
    if wmg is None:  # γ = 0
        wmg = v.copy()
    if p.use_tv and ymb is None:  # β = 0
        ymb = xp.zeros((n_frames, 3, *v.shape[1:]), dtype=dt)
        for t in range(n_frames):
            steps.gradient_minus(v[t], ymb[t], tv_z_weight)
    if mv is None:
        mv = _forward_padded(p, v) if init is not None else xp.zeros_like(alpha)
    rhs: Any = xp.empty_like(v) if p.use_tv else None
    # w of the iteration before a check, then of the check itself (one buffer: the w-step
    # returns ‖w − w_prev‖² before overwriting); ρ·y of the same two iterations, by parity.
    # Only a check at the first iteration reads a "previous" w or y never written (as zero;
    # iteration 1 writes slot 1 and reads slot 0 as the previous y).
    fresh = xp.zeros_like if iterations == 1 or check_every == 1 else xp.empty_like
    w = fresh(v)
    y_saved: list[Any] = [fresh(ymb), xp.empty_like(ymb)] if p.use_tv else [None, None]
    x_denominator = xp.full(shape, 1.0 / mu[0], dtype=dt)
    x_denominator[sensor[1:]] = 1.0 / (1.0 + mu[0])
    x = xp.zeros_like(alpha)  # read as the previous x by a check at iteration 1
    x_old = xp.empty_like(alpha)
    x_minus_alpha = xp.empty_like(alpha)  # relaxed x minus α; then α = Mv − this
    # the window's DCT-II of the right-hand sides (without TV wmg itself is kept)
    window_source: Any = xp.empty_like(v) if temporal and not p.use_tv else None
    window_sensor: Any = xp.empty_like(alpha) if temporal else None
    rho = RELAXATION
    track = stop_change > 0  # compare w with the previous iterate every iteration
    last_change = math.inf
    history: dict[str, list[float]] = {"iteration": [], "primal": [], "dual": [],
                                       "mu1": [], "mu2": [], "mu3": [], "change": []}
    converged = False
    it = 0
    for it in range(1, iterations + 1):
        check = it % check_every == 0 or it == iterations
        before_check = (it + 1) % check_every == 0 or it + 1 == iterations
        slot = it % 2 if check or before_check else None
        # x-update (element-wise, crop-aware least squares)
        if check:
            x_old[...] = x
        xp.add(mv, alpha, out=x)
        x *= mu[0]
        x += p.b_padded
        x *= x_denominator
        w_change = w_energy = 0.0
        for t in range(n_frames):
            # y-update: group shrinkage, folded into the implicit dual ymb
            if p.use_tv:
                steps.tv_dual_step(v[t], ymb[t], None if slot is None else y_saved[slot][t],
                                   tv / mu[1], rho, tv_z_weight)
            # w-update and the spatial right-hand side μ₃(ŵ − γ) + μ₂∇ᵀ(ŷ − β)
            change_t, energy_t = steps.w_step(
                v[t], wmg[t], None if rhs is None else rhs[t], None if ymb is None else ymb[t],
                w[t] if track or slot is not None else None, l1 / mu[2], rho, mu[1], mu[2],
                tv_z_weight, (ny, nx), compare=check or track)
            w_change += change_t
            w_energy += energy_t
        change = math.sqrt(w_change / max(w_energy, 1e-30)) if track else math.inf
        # Settled: small and falling. After a warm start the change first grows for several
        # iterations while the new frame's data spreads through the splits.
        settled = it > 2 and change <= stop_change and change < last_change
        last_change = change if it > 1 else math.inf  # iteration 1 compares a stale buffer
        # relaxed x̂ = ρx + (1 − ρ)Mv, minus α
        xp.multiply(mv, 1 - rho, out=x_minus_alpha)
        x_minus_alpha += rho * x
        x_minus_alpha -= alpha
        # v-update, exact in the lateral Fourier domain and, with the prior, along the window
        # by an orthonormal DCT-II (real, before the 2-D FFTs: the transforms commute). One
        # frame's spectra at a time keeps the FFTs' working set that of a single frame.
        source = rhs if p.use_tv else wmg
        sensor_rhs = x_minus_alpha
        if temporal:  # with TV the scratch rhs is transformed in place, wmg is kept
            source = steps.window_dct(source, rhs if p.use_tv else window_source)
            sensor_rhs = steps.window_dct(x_minus_alpha, window_sensor)
        for k in range(n_frames):
            r_hat = be.rfft2(source[k], shape)
            x_hat = be.rfft2(sensor_rhs[k], shape)
            x_hat *= mu[0]
            mv_hat = steps.volume_solve(
                r_hat, p.h, x_hat, p.lateral, 1.0 if p.use_tv else mu[2], mu[0], mu[1],
                mu[2] + shifts[k], mu[1] * tv_z_weight * tv_z_weight, gain=p.sum_abs2)
            if n_frames == 1:  # the transforms' new arrays become the iterates: no copies
                v = be.irfft2(r_hat, shape, overwrite=True)[None]
                mv = be.irfft2(mv_hat, shape, overwrite=True)[None]
            else:
                v[k] = be.irfft2(r_hat, shape, overwrite=True)
                mv[k] = be.irfft2(mv_hat, shape, overwrite=True)
        del source, r_hat
        if temporal:
            steps.window_dct(v, v, inverse=True)
            steps.window_dct(mv, mv, inverse=True)
        xp.subtract(mv, x_minus_alpha, out=alpha)
        if not check:
            if settled:
                converged = True
                break
            continue
        # residuals, normalised (Wohlberg 2017 §II); y is stored as ρ·y
        norms = [steps.w_norms(v[t], w[t], wmg[t]) for t in range(n_frames)]
        vw, vv, ww, gg = (sum(n[j] for n in norms) for j in range(4))
        r1 = _norm(xp, mv - x)
        s1 = mu[0] * p.norm_mt(be.rfft2(x - x_old, shape))
        rs = [r1, math.sqrt(vw)]
        ss = [s1, mu[2] * math.sqrt(w_change)]
        primal_ref = [max(_norm(xp, mv), _norm(xp, x)), math.sqrt(max(vv, ww))]
        dual_ref = [mu[0] * p.norm_mt(be.rfft2(alpha, shape)), mu[2] * math.sqrt(gg)]
        if p.use_tv:
            tv_sums = [steps.tv_norms(v[t], y_saved[it % 2][t], y_saved[(it - 1) % 2][t],
                                      ymb[t], tv_z_weight, rho) for t in range(n_frames)]
            gy, g2, y2, dy, db = (sum(n[j] for n in tv_sums) for j in range(5))
            rs.append(math.sqrt(gy))
            ss.append(mu[1] * math.sqrt(dy))
            primal_ref.append(math.sqrt(max(g2, y2)))
            dual_ref.append(mu[1] * math.sqrt(db))
        tiny = 1e-30
        primal = math.hypot(*rs) / max(math.hypot(*primal_ref), tiny)
        dual = math.hypot(*ss) / max(math.hypot(*dual_ref), tiny)
        history["iteration"].append(it)
        history["primal"].append(primal)
        history["dual"].append(dual)
        history["change"].append(math.sqrt(w_change / max(w_energy, tiny)))
        for k in range(3):
            history[f"mu{k + 1}"].append(mu[k])
        if (primal < tol and dual < tol) or settled:
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
                factor = 1.0 / BALANCE_FACTOR
            elif sn > BALANCE_RATIO * rn:
                factor = BALANCE_FACTOR
            else:
                continue
            mu[k] /= factor
            changed = True
            # scaled duals follow: α, γ = v − wmg and β = ∇v − ymb times `factor`
            if k == 0:
                alpha *= factor
            elif k == 2:
                wmg *= factor
                wmg += (1 - factor) * v
            else:  # ymb → β, scale, → ymb
                for t in range(n_frames):
                    steps.gradient_minus(v[t], ymb[t], tv_z_weight)
                ymb *= factor
                for t in range(n_frames):
                    steps.gradient_minus(v[t], ymb[t], tv_z_weight)
        if changed:
            x_denominator[...] = 1.0 / mu[0]
            x_denominator[sensor[1:]] = 1.0 / (1.0 + mu[0])

    arrays = {"v": v, "alpha": alpha, "wmg": wmg, "mv": mv}
    if p.use_tv:  # ymb = ∇v − β depends on ∇'s depth weight: the next solve may change it
        arrays["ymb"] = ymb
        arrays["tv_z_weight"] = xp.full(n_frames, tv_z_weight, dtype=np.float64)
    state = SolverState("admm", arrays, tuple(mu))
    # The returned volumes are the feasible split w (≥ 0, zero off the field).
    volumes = xp.ascontiguousarray(w[:, :, :ny, :nx])
    return volumes, it, converged, state, history
