"""FISTA with adaptive (gradient) restart for the regularised least-squares problem.

``min_v ½‖Av − b‖² + l1·Σv + tv·TV(v)`` over ``v ≥ 0``: a gradient step of length ``1/L``
(``L`` = the model's cached ‖A‖² from power iteration) followed by the proximal map of the
non-smooth part — a shifted non-negative clip without TV, the fast gradient projection of
:func:`volrecon.solvers.tv.tv_prox` with TV (its dual warm-started between iterations).
Momentum restarts when ``⟨y_k − v_{k+1}, v_{k+1} − v_k⟩ > 0``. Stops when the relative
change ``‖v_{k+1} − v_k‖ / ‖v_{k+1}‖`` falls below `tol`.

References
----------
A. Beck, M. Teboulle, "A fast iterative shrinkage-thresholding algorithm for linear inverse
problems", SIAM J. Imaging Sci. 2 (2009).
B. O'Donoghue, E. Candès, "Adaptive restart for accelerated gradient schemes",
Found. Comput. Math. 15 (2015).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from volrecon.solvers.info import SolverState
from volrecon.solvers.tv import tv_prox

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.models.base import PSFModel

__all__ = ["solve_fista"]

TV_INNER_ITERATIONS = 8


def solve_fista(frame: Array, model: PSFModel, *, iterations: int, tv: float, l1: float,
                tol: float, tv_z_weight: float, init: Array | SolverState | None,
                ) -> tuple[Array, int, bool, SolverState, dict[str, list[float]]]:
    """Run FISTA on one frame (arrays already on the model's backend)."""
    xp = model.backend.xp
    step = 1.0 / model.operator_norm_squared()
    if isinstance(init, SolverState):
        v = init.arrays["v"].copy()
    elif init is not None:
        v = init.copy()
    else:
        v = xp.zeros(model.shape_in, dtype=model.dtype)
    y = v.copy()
    t = 1.0
    dual = None
    history: dict[str, list[float]] = {"iteration": [], "change": [], "restart": []}
    converged = False
    it = 0
    for it in range(1, iterations + 1):
        residual = model.forward(y)
        residual -= frame
        z = model.adjoint(residual)
        z *= -step
        z += y
        if l1 > 0:
            z -= step * l1
        if tv > 0:
            v_next, dual = tv_prox(z, step * tv, tv_z_weight, iterations=TV_INNER_ITERATIONS,
                                   dual=dual)
        else:
            v_next = xp.maximum(z, 0, out=z)
        delta = v_next - v
        restart = float(xp.vdot((y - v_next).ravel(), delta.ravel()).real) > 0
        if restart:
            t = 1.0
        t_next = (1.0 + math.sqrt(1.0 + 4.0 * t * t)) / 2.0
        y = v_next + ((t - 1.0) / t_next) * delta if not restart else v_next.copy()
        t = t_next
        norm_next = math.sqrt(float(xp.vdot(v_next.ravel(), v_next.ravel()).real))
        change = math.sqrt(float(xp.vdot(delta.ravel(), delta.ravel()).real))
        change /= max(norm_next, 1e-30)
        v = v_next
        history["iteration"].append(it)
        history["change"].append(change)
        history["restart"].append(float(restart))
        if change < tol and it > 1:
            converged = True
            break
    return v, it, converged, SolverState("fista", {"v": v}), history
