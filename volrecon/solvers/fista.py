"""FISTA with adaptive restart for the regularised least-squares problem.

``min_v F(v) = ½‖Av − b‖² + l1·Σv + tv·TV(v)`` over ``v ≥ 0``: a gradient step of length
``1/L`` (``L`` = the model's cached ‖A‖² from power iteration) followed by the proximal map of
the non-smooth part — a shifted non-negative clip without TV, a few iterations of the fast
gradient projection of :func:`volrecon.solvers.tv.tv_prox` with TV, its dual warm-started
from the previous iteration. Stops when the relative change ``‖v_{k+1} − v_k‖ / ‖v_{k+1}‖``
falls below `tol`.

Momentum restarts (``t = 1``) when ``⟨y_k − v_{k+1}, v_{k+1} − v_k⟩ > 0`` (the gradient
scheme of O'Donoghue and Candès) and, with TV, also when the objective rises,
``F(v_k) > F(v_{k−1})`` (their function scheme). The second test is what keeps FISTA convergent
with an inexact prox: on the 16×128² bench problem with tv = 1e-2 and 5e-2 of the frame's
peak and 8 inner iterations, the gradient test alone never fired and FISTA settled 1 % and
46 % above the optimum; with the function test it reaches a 0.1 % gap in 116 and 196
iterations. ``F(v_k)`` costs no transform: ``A y_k`` is computed anyway, and because
``y_k = v_k + β_k (v_k − v_{k−1})``, ``A v_k = (A y_k + β_k A v_{k−1}) / (1 + β_k)``; the
penalties of ``v_k`` come with the inner products of the iteration before.

References
----------
A. Beck, M. Teboulle, "A fast iterative shrinkage-thresholding algorithm for linear inverse
problems", SIAM J. Imaging Sci. 2 (2009).
A. Beck, M. Teboulle, "Fast gradient-based algorithms for constrained total variation image
denoising and deblurring problems", IEEE Trans. Image Process. 18 (2009).
B. O'Donoghue, E. Candès, "Adaptive restart for accelerated gradient schemes",
Found. Comput. Math. 15 (2015).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from volrecon.solvers.fused_steps import steps_for
from volrecon.solvers.info import SolverState
from volrecon.solvers.tv import tv_prox

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.models.base import PSFModel

__all__ = ["solve_fista"]

#: Dual iterations of the TV prox per FISTA iteration (warm-started from the previous dual).
#: Measured on the 16×128² bench problem (``volrecon.bench.iteration.problem``), FISTA
#: iterations to a 1 % objective gap (optimum from 3000 ADMM iterations) for 2, 3, 4, 6, 8
#: inner iterations: tv = 1e-3 of the frame's peak 189, 188, 188, 187, 187; tv = 1e-2: 92, 65,
#: 57, 46, 45; tv = 5e-2: 369, 257, 180, 119, 77. An inner iteration costs about 0.1 FFT
#: bound against about 2 for the rest of the iteration, so time to the gap is within 1.3× of
#: the best count at all three weights with 8 (2: 3.6×, 4: 2×, 6: 1.4×, all at 5e-2).
TV_INNER_ITERATIONS = 8
#: Relative rise of the objective that counts as a rise for the function restart: above the
#: float32 rounding of the objective, far below the rises an inexact prox causes (≥ 1e-3).
FUNCTION_RESTART_SLACK = 1e-6


def solve_fista(frame: Array, model: PSFModel, *, iterations: int, tv: float, l1: float,
                tol: float, tv_z_weight: float, init: Array | SolverState | None,
                compiled: bool | None = None,
                ) -> tuple[Array, int, bool, SolverState, dict[str, list[float]]]:
    """Run FISTA on one frame (arrays already on the model's backend).

    `compiled` chooses the fused steps of :mod:`volrecon.solvers.fused_steps` (default: numba
    on the CPU in float32, whole-array expressions otherwise).
    """
    be = model.backend
    xp = be.xp
    steps = steps_for(be, model.dtype, compiled=compiled)
    step = 1.0 / model.operator_norm_squared()
    shift = step * l1 if l1 > 0 else 0.0
    if isinstance(init, SolverState):
        v = init.arrays["v"].copy()
    elif init is not None:
        v = init.copy()
    else:
        v = xp.zeros(model.shape_in, dtype=model.dtype)
    y = v.copy()
    t = 1.0
    beta = 0.0  # y = v + beta·(v − v_previous)
    dual = scratch = spare = None
    penalties = value = math.inf  # of the current v, with TV
    residual_v = None  # A v − b, with TV
    if tv > 0:
        nz, ny, nx = model.shape_in
        scratch = xp.empty((3, nz, ny + 1, nx + 1), dtype=model.dtype)
        spare = xp.empty(model.shape_in, dtype=model.dtype)
        *_, total, tv_sum = steps.fista_products_tv(v, v, v, tv_z_weight)
        penalties = l1 * total + tv * tv_sum
    history: dict[str, list[float]] = {"iteration": [], "change": [], "restart": []}
    converged = False
    it = 0
    for it in range(1, iterations + 1):
        residual = model.forward(y)
        residual -= frame
        function_restart = False
        if tv > 0:
            if beta == 0.0 or residual_v is None:
                residual_v = residual
            else:
                residual_v = (residual + beta * residual_v) / (1.0 + beta)
            previous, value = value, 0.5 * _squared_norm(residual_v) + penalties
            if beta != 0.0 and value > previous * (1.0 + FUNCTION_RESTART_SLACK):
                function_restart = True
                t = 1.0
                xp.copyto(y, v)
                residual = residual_v
        u = model.adjoint(residual)  # a new array: the gradient, then the next iterate
        if tv > 0:
            steps.fista_gradient_step(y, u, v, step, shift, clip=False)
            # The prox writes into the point of the previous iteration's prox (free by now):
            # output rows that alias input rows would not vectorise.
            point = u
            u, dual = tv_prox(point, step * tv, tv_z_weight, iterations=TV_INNER_ITERATIONS,
                              dual=dual, overwrite_dual=True, out=spare, scratch=scratch,
                              threads=be.threads,
                              compiled=False if compiled is False else None)
            spare = point
            restart_product, norm_squared, change_squared, total, tv_sum = (
                steps.fista_products_tv(y, u, v, tv_z_weight))
            penalties = l1 * total + tv * tv_sum
        else:
            restart_product, norm_squared, change_squared = steps.fista_gradient_step(
                y, u, v, step, shift, clip=True)
        restart = restart_product > 0
        if restart:
            t = 1.0
            xp.copyto(y, u)
        t_next = (1.0 + math.sqrt(1.0 + 4.0 * t * t)) / 2.0
        beta = 0.0 if restart else (t - 1.0) / t_next
        if not restart:
            steps.fista_momentum(y, u, v, beta)
        t = t_next
        change = math.sqrt(change_squared) / max(math.sqrt(norm_squared), 1e-30)
        v = u
        history["iteration"].append(it)
        history["change"].append(change)
        history["restart"].append(float(restart or function_restart))
        if change < tol and it > 1:
            converged = True
            break
    return v, it, converged, SolverState("fista", {"v": v}), history


def _squared_norm(a: Array) -> float:
    """``‖a‖²`` of a (small, 2-D) array, summed in float64."""
    flat = a.ravel().astype("float64")
    return float((flat * flat).sum())
