"""Richardson–Lucy deconvolution, optionally with TV and l1 penalties.

Multiplicative update for Poisson data: ``v ← v ⊙ Aᵀ(b / (Av + ε)) / (Aᵀ1 + l1 − tv·div(∇v/|∇v|))``.
With tv = l1 = 0 this is the classical RL iteration; with tv > 0 it is the TV-regularised form
of Dey et al. (2006). Negative frame values (after background subtraction) are clipped to
zero. Stops when the relative change of v falls below `tol`.

References
----------
W. H. Richardson, "Bayesian-based iterative method of image restoration", JOSA 62 (1972).
L. B. Lucy, "An iterative technique for the rectification of observed distributions",
Astron. J. 79 (1974).
N. Dey et al., "Richardson–Lucy algorithm with total variation regularization for 3D confocal
microscope deconvolution", Microsc. Res. Tech. 69 (2006).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from volrecon.solvers.fused_steps import steps_for
from volrecon.solvers.info import SolverState

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.models.base import PSFModel

__all__ = ["solve_rl"]

EPSILON = 1e-12


def solve_rl(frame: Array, model: PSFModel, *, iterations: int, tv: float, l1: float,
             tol: float, tv_z_weight: float, init: Array | SolverState | None,
             compiled: bool | None = None,
             ) -> tuple[Array, int, bool, SolverState, dict[str, list[float]]]:
    """Run Richardson–Lucy on one frame (arrays already on the model's backend).

    `compiled` chooses the fused steps of :mod:`volrecon.solvers.fused_steps` (default: numba
    on the CPU in float32, whole-array expressions otherwise).
    """
    xp = model.backend.xp
    steps = steps_for(model.backend, model.dtype, compiled=compiled)
    b = xp.maximum(frame, 0)
    sensitivity = model.sensitivity()  # cached: one adjoint per model, not per frame
    floor = float(sensitivity.max()) * 1e-6
    sensitivity = xp.maximum(sensitivity, floor)
    if isinstance(init, SolverState):
        v = init.arrays["v"].copy()
    elif init is not None:
        v = xp.maximum(init, 0).astype(model.dtype)
    else:
        level = float(b.sum()) / float(sensitivity.sum())
        v = xp.full(model.shape_in, max(level, EPSILON), dtype=model.dtype)
    # Without TV the denominator is the same every iteration.
    denominator = sensitivity if l1 <= 0 else sensitivity + l1
    history: dict[str, list[float]] = {"iteration": [], "change": []}
    converged = False
    it = 0
    for it in range(1, iterations + 1):
        blurred = model.forward(v)
        blurred += EPSILON
        ratio = xp.divide(b, blurred, out=blurred)
        v_next = model.adjoint(ratio)  # a new array: the correction, then the next iterate
        if tv > 0:
            change_squared, norm_squared = steps.rl_tv_update(
                v, v_next, sensitivity, l1, tv, floor, tv_z_weight)
        else:
            change_squared, norm_squared = steps.rl_update(v, v_next, denominator)
        change = math.sqrt(change_squared) / max(math.sqrt(norm_squared), 1e-30)
        v = v_next
        history["iteration"].append(it)
        history["change"].append(change)
        if change < tol and it > 1:
            converged = True
            break
    return v, it, converged, SolverState("rl", {"v": v}), history
