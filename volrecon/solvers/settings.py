"""The solver settings every frame of a job, a preview, a tuning run and a benchmark share."""

from __future__ import annotations

import math
from dataclasses import dataclass

from volrecon.errors import ConfigError

__all__ = ["METHODS", "SolverSettings"]

METHODS = ("admm", "fista", "rl")


@dataclass(frozen=True)
class SolverSettings:
    """How each frame is reconstructed: the ``[solver]`` section of a job file.

    Checked when made, so a preview, a tuning run and a job refuse the same mistakes.

    Attributes
    ----------
    method : {"admm", "fista", "rl"}
        Solver (see :func:`volrecon.reconstruct`).
    iterations : int
        Iteration limit per frame, at least 1.
    tv, l1 : float
        Regularisation weights, >= 0, in the units of the model and the frame.
    tol : float
        Stopping tolerance, >= 0 (0 runs every iteration).
    tv_z_weight : float
        Weight of depth differences in TV, > 0.
    warm_start : bool
        Start each frame of a chain from the previous frame's solver state.
    warm_start_frames : int
        Frames per warm-start chain, at least 1 (a chain starts from scratch at every
        multiple of it counted from the job's first frame). Ignored without `warm_start`.
    max_residual : float
        A frame whose relative data residual exceeds this is recorded as failed (> 0).

    Raises
    ------
    ConfigError
        If a value is outside its range.

    Examples
    --------
    >>> SolverSettings(method="fista", iterations=30, tv=0.01).label()
    'fista 30 it, tv 0.01'
    """

    method: str = "admm"
    iterations: int = 60
    tv: float = 0.0
    l1: float = 0.0
    tol: float = 1e-4
    tv_z_weight: float = 1.0
    warm_start: bool = True
    warm_start_frames: int = 8
    max_residual: float = 2.0

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ConfigError(f"method must be one of {', '.join(METHODS)}; got {self.method!r}")
        for name in ("iterations", "warm_start_frames"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ConfigError(f"{name} must be an integer of at least 1; got {value!r}")
        for name in ("tv", "l1", "tol"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
                raise ConfigError(f"{name} must be a finite number >= 0; got {value!r}")
        for name in ("tv_z_weight", "max_residual"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ConfigError(f"{name} must be a finite number > 0; got {value!r}")

    @property
    def chain_frames(self) -> int:
        """Frames per warm-start chain: `warm_start_frames`, or 1 without warm start."""
        return self.warm_start_frames if self.warm_start else 1

    def label(self) -> str:
        """Short text naming the settings, e.g. ``"admm 50 it, tv 0.01"``."""
        text = f"{self.method} {self.iterations} it"
        if self.tv:
            text += f", tv {self.tv:g}"
        if self.l1:
            text += f", l1 {self.l1:g}"
        return text
