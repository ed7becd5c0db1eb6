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
    iterations : int or "auto"
        Iteration limit per frame, at least 1; or "auto": each frame stops by the rule of
        :func:`volrecon.reconstruct` (relative change of the volume), so warm frames take a
        few iterations and a chain's cold first frame more.
    tv, l1 : float
        Regularisation weights, >= 0, in the units of the model and the frame.
    tol : float
        Stopping tolerance, >= 0 (0 runs every iteration).
    tv_z_weight : float
        Weight of depth differences in TV, > 0.
    warm_start : bool
        Start each frame of a chain from the previous frame's solver state. Without it
        every frame is a chain of its own (`chain_frames` becomes 1, `lead_in_frames` 0).
    chain_frames : int
        Frames per warm-start chain, at least 1: chains are ``[k·chain_frames,
        (k+1)·chain_frames)`` counted from the job's first frame, whatever ``[compute]`` says.
    lead_in_frames : int
        Frames before a chain's first frame that are solved, not stored, so that the chain's
        first stored frame is warm too (>= 0; fewer at the job's first frame, none before it).
    temporal_window : int
        Frames solved together (1: each frame alone). Windows are consecutive frames inside a
        chain, broken where the scene changes abruptly (see :func:`plan_windows`); ADMM only.
    temporal_weight : float
        Weight (>= 0) of the temporal prior ``½ Σ_t ‖v_{t+1} − v_t‖²`` inside a window, in
        the units of the model and the frame like `l1` and `tv` (squared: it is quadratic).
    max_residual : float
        A frame whose relative data residual ``|Av - b| / |b|`` is at least this is recorded
        as failed (> 0). The all-zero volume scores exactly 1 (it explains none of the
        frame), so the default 0.95 refuses it, and a volume explaining less than about 10 %
        of the frame's squared norm (1 - 0.95²), as well as a diverged one.

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
    iterations: int | str = "auto"
    tv: float = 0.0
    l1: float = 0.0
    tol: float = 1e-4
    tv_z_weight: float = 1.0
    warm_start: bool = True
    chain_frames: int = 32
    lead_in_frames: int = 2
    temporal_window: int = 1
    temporal_weight: float = 0.0
    max_residual: float = 0.95

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ConfigError(f"method must be one of {', '.join(METHODS)}; got {self.method!r}")
        if self.iterations != "auto":
            _check_count("iterations", self.iterations, also="or 'auto'")
        _check_count("chain_frames", self.chain_frames)
        lead = self.lead_in_frames
        if isinstance(lead, bool) or not isinstance(lead, int) or lead < 0:
            raise ConfigError(f"lead_in_frames must be an integer >= 0; got {lead!r}")
        if not self.warm_start:
            object.__setattr__(self, "chain_frames", 1)
            object.__setattr__(self, "lead_in_frames", 0)
        _check_count("temporal_window", self.temporal_window)
        if self.temporal_window > 1 and self.method != "admm":
            raise ConfigError(f"temporal_window > 1 needs method = \"admm\" ({self.method} "
                              "solves frames one at a time); set temporal_window = 1")
        for name in ("tv", "l1", "tol", "temporal_weight"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
                raise ConfigError(f"{name} must be a finite number >= 0; got {value!r}")
        for name in ("tv_z_weight", "max_residual"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ConfigError(f"{name} must be a finite number > 0; got {value!r}")

    def chain_span(self, chain_start: int, first: int = 0) -> int:
        """The first frame solved for the chain that stores from `chain_start`: its lead-in
        reaches back `lead_in_frames`, never before the job's `first` frame."""
        return max(first, chain_start - self.lead_in_frames)

    def label(self) -> str:
        """Short text naming the settings, e.g. ``"admm 50 it, tv 0.01"``."""
        text = (f"{self.method} auto it" if self.iterations == "auto"
                else f"{self.method} {self.iterations} it")
        if self.tv:
            text += f", tv {self.tv:g}"
        if self.l1:
            text += f", l1 {self.l1:g}"
        return text


def _check_count(name: str, value: object, *, also: str = "") -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise ConfigError(f"{name} must be an integer of at least 1{' ' + also if also else ''}; "
                          f"got {value!r}")
