"""What a solve reports, and the state a warm start carries to the next frame."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

__all__ = ["SolveInfo", "SolverState"]


@dataclass(frozen=True)
class SolverState:
    """Everything a method needs to continue from a previous frame's solution.

    Attributes
    ----------
    method : str
        The method that produced it; a state only warm-starts the same method.
    arrays : dict
        Method-specific arrays (for ADMM the padded volume, splits and scaled duals).
    penalties : tuple of float
        ADMM penalty parameters at the end of the solve (empty for other methods).
    """

    method: str
    arrays: dict[str, Any] = field(default_factory=dict)
    penalties: tuple[float, ...] = ()


@dataclass(frozen=True)
class SolveInfo:
    """Diagnostics of one frame's reconstruction.

    Attributes
    ----------
    method : str
        "admm", "fista" or "rl".
    iterations : int
        Iterations run.
    objective : float
        Final ``½‖Av − b‖² + l1·Σv + tv·TV(v)`` (for "rl": the same expression, reported for
        comparison, although RL maximises a Poisson likelihood).
    residual : float
        Relative data residual ``‖Av − b‖ / ‖b‖``.
    converged : bool
        True when the stopping rule met `tol` before the iteration limit.
    seconds : float
        Wall-clock time of the solve.
    state : SolverState
        Pass as ``init=`` to warm-start the next frame.
    history : dict
        Per-check traces (``iteration``, ``objective``, ``primal``, ``dual`` …) for plotting.
    """

    method: str
    iterations: int
    objective: float
    residual: float
    converged: bool
    seconds: float
    state: SolverState
    history: dict[str, list[float]] = field(default_factory=dict)
