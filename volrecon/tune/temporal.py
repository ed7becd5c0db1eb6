"""The temporal-weight sweep: every other frame held out, predicted from its neighbours.

Held-out criterion
------------------
A job with ``temporal_window = W > 1`` solves W frames together with
``λ·½ Σ_t ‖v_{t+1} − v_t‖²``. To score λ without ground truth, take a *run* of ``2m − 1``
consecutive frames around a site (``m = ⌈W/2⌉ + 1``, so the run spans at least a window),
drop the data of the odd frames and solve the m even frames as one window. Dropping is
exact and cheap:

- With the whole per-frame term of an odd frame removed, that frame's volume appears only
  in ``λ/2 (‖v_{2j+1} − v_{2j}‖² + ‖v_{2j+2} − v_{2j+1}‖²)``, which is smallest at the
  midpoint ``v_{2j+1} = (v_{2j} + v_{2j+2})/2`` (non-negative when its neighbours are) and
  there equals ``λ/4 ‖v_{2j+2} − v_{2j}‖²``. So the full window with the odd data removed is
  *exactly* the window of the even frames with weight ``λ/2`` on their differences,
  ``(λ/2)·½ Σ_j ‖v_{2j+2} − v_{2j}‖²``, which :func:`volrecon.solvers.reconstruct_window`
  solves with its DCT-diagonal v-update (no per-frame data weights, so the diagonalisation
  along time stays intact). The same factor follows from the prior read as a Gaussian random
  walk, ``v_{t+1} − v_t ~ N(0, q)`` with ``λ = σ²/q``: every other step of it is a random walk
  of variance ``2q``, weight ``λ/2`` (for a deterministic smooth drift the continuum limit
  would give ``λ/4``, a factor of 2 less; the grid's step is √10).
- Each odd frame is then predicted by ``A (v_{2j} + v_{2j+2})/2`` and scored against its own
  data: ``‖A v̄ − b_{2j+1}‖² − Σσ²_{2j+1}`` is an unbiased estimate of ``‖A v̄ − s_{2j+1}‖²``
  (its noise is independent of the even frames'), per pixel, as the tv × l1 sweep scores its
  neighbours (:mod:`volrecon.tune.criteria`).
- The discrepancy ratio ``Σ_even ‖A v − b‖² / Σ_even E‖n‖²`` refuses weights that no longer
  explain the kept frames (the same limit as the tv × l1 sweep).
- Among the admissible weights the smallest whose mean held-out error exceeds the lowest
  by at most one standard error is chosen: the one-standard-error rule of Breiman et al.
  [1]_, with the standard error of the paired per-frame differences (the frames' own
  difficulty is common to all weights and cancels). On unrelated scenes a prior shrinks the
  midpoint towards the run's mean, which predicts an unrelated frame slightly better by
  chance; that gain scatters from frame to frame by more than its size, so the rule keeps
  λ = 0. On a drifting scene the gain of a small weight over none is about two standard
  errors on a single run of 9 frames (measured), more with more sites.

Grid
----
λ is laid out in units of ``‖A‖²`` (the largest eigenvalue of ``AᵀA``; the prior acts on the
parts of the volume the data determine to less than that): ``{0, 10⁻³, 10⁻², 10⁻¹}``, then
the half-decade neighbours of the best, widened outwards while the best lies on the upper
edge (at most twice more).

References
----------
.. [1] L. Breiman, J. H. Friedman, R. A. Olshen, C. J. Stone, *Classification and Regression
   Trees*, Wadsworth (1984), §3.4.3.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import DataError, VolreconWarning
from volrecon.solvers import reconstruct_window
from volrecon.solvers.norms import squared_norm
from volrecon.tune.criteria import DISCREPANCY_MARGIN
from volrecon.tune.execute import run_calls
from volrecon.tune.sweep import FINE_STEP

if TYPE_CHECKING:
    from volrecon.io.correct import FrameCorrection
    from volrecon.io.frames import FrameSource
    from volrecon.models.base import PSFModel
    from volrecon.pipeline.config import ComputeSettings
    from volrecon.solvers import SolverSettings
    from volrecon.tune.noise import FrameNoise

__all__ = [
    "COARSE_WEIGHT_UNITS",
    "TemporalCell",
    "TemporalSweep",
    "read_runs",
    "run_length",
    "solve_interleaved",
    "sweep_temporal_weight",
]

COARSE_WEIGHT_UNITS = (0.0, 1e-3, 1e-2, 1e-1)
#: Widen the grid past its upper edge at most this many times.
MAX_WIDENINGS = 2


@dataclass(frozen=True, eq=False)
class InterleavedSolve:
    """One weight on one run: the even frames solved, the odd ones predicted.

    Attributes
    ----------
    volumes : ndarray of shape (m, Z, Y, X), float32
        The even frames' reconstructions.
    residual_energy : float
        ``Σ_even ‖A v − b‖²``.
    holdout_energy : tuple of float
        ``‖A (v_{2j} + v_{2j+2})/2 − b_{2j+1}‖²`` of each odd frame.
    seconds : float
    """

    volumes: np.ndarray
    residual_energy: float
    holdout_energy: tuple[float, ...]
    seconds: float


def solve_interleaved(model: PSFModel, frames_tyx: np.ndarray, tv: float, l1: float,
                      weight: float, iterations: int, settings: SolverSettings
                      ) -> InterleavedSolve:
    """Solve the even frames of a run as one window (weight ``weight/2``); score the odd ones.

    Parameters
    ----------
    model : PSFModel
        On its device with its FFT threads.
    frames_tyx : ndarray of shape (2m − 1, Y, X), float32
        Consecutive corrected frames, m ≥ 2.
    tv, l1 : float
        Per-frame weights.
    weight : float
        Temporal weight of the *full* window (see the module notes for the factor 1/2).
    iterations : int
        Iteration limit of the window.
    settings : SolverSettings
        The job's settings (``tol`` and ``tv_z_weight`` are used).

    Returns
    -------
    InterleavedSolve
    """
    start = time.perf_counter()
    frames = np.asarray(frames_tyx, dtype=np.float32)
    even, odd = frames[0::2], frames[1::2]
    solved, _ = reconstruct_window(even, model, iterations=int(iterations), tv=tv, l1=l1,
                                   tol=settings.tol, tv_z_weight=settings.tv_z_weight,
                                   temporal_weight=0.5 * float(weight))
    volumes = np.asarray(model.backend.to_numpy(solved), dtype=np.float32)
    predicted = np.stack([np.asarray(model.backend.to_numpy(model.forward(v)), np.float64)
                          for v in volumes])
    residual = squared_norm(predicted - even)
    midpoints = 0.5 * (predicted[:-1] + predicted[1:])
    holdout = tuple(squared_norm(p - b) for p, b in zip(midpoints, odd, strict=True))
    return InterleavedSolve(volumes=volumes, residual_energy=residual, holdout_energy=holdout,
                            seconds=time.perf_counter() - start)


@dataclass(frozen=True, eq=False)
class TemporalCell:
    """One temporal weight and what it gave.

    Attributes
    ----------
    weight_units, weight : float
        The weight in units of ``‖A‖²``, and itself (what the job file gets).
    stage : int
        0 for the coarse grid, 1 and up for the fine stage and each widening.
    discrepancy : float
        ``Σ ‖A v − b‖² / Σ E‖n‖²`` over the kept (even) frames of every run.
    prediction_errors : tuple of float
        Per held-out frame (of every run), the estimated ``‖A v̄ − s‖² / N`` (per pixel).
    volumes : ndarray of shape (runs, m, Z, Y, X), float32
        The even frames' reconstructions.
    seconds : float
    """

    weight_units: float
    weight: float
    stage: int
    discrepancy: float
    prediction_errors: tuple[float, ...]
    volumes: np.ndarray = field(repr=False)
    seconds: float

    @property
    def mean_prediction_error(self) -> float:
        """Held-out prediction error averaged over the held-out frames (per pixel)."""
        return float(np.mean(self.prediction_errors))


@dataclass(frozen=True, eq=False)
class TemporalSweep:
    """The temporal-weight sweep and its choice.

    Attributes
    ----------
    cells : tuple of TemporalCell
        Sorted by weight.
    index : int
        The chosen cell.
    best_index : int
        The admissible cell of the lowest held-out error (before the one-standard-error rule).
    discrepancy_limit : float
        Largest admissible discrepancy ratio.
    unit : float
        ``‖A‖²``.
    run_frames : tuple of int
        First video frame of each run.
    run_length : int
        Frames per run (``2m − 1``).
    """

    cells: tuple[TemporalCell, ...] = field(repr=False)
    index: int
    best_index: int
    discrepancy_limit: float
    unit: float
    run_frames: tuple[int, ...]
    run_length: int

    @property
    def chosen(self) -> TemporalCell:
        """The chosen cell."""
        return self.cells[self.index]

    @property
    def weight(self) -> float:
        """Chosen weight, rounded to 3 significant digits (as written to the job)."""
        value = self.chosen.weight
        return float(f"{value:.3g}") if value else 0.0


def run_length(window: int, n_frames: int) -> int:
    """Frames per run, ``2m − 1`` with ``m = ⌈W/2⌉ + 1``, at most the video's (odd) length."""
    m = (window + 1) // 2 + 1
    longest = n_frames if n_frames % 2 else n_frames - 1
    return max(3, min(2 * m - 1, longest))


def read_runs(source: FrameSource, correction: FrameCorrection, centres: Sequence[int],
              length: int) -> tuple[tuple[int, ...], list[np.ndarray]]:
    """Read `length` consecutive corrected frames centred (where the video allows) on each site.

    Returns
    -------
    starts : tuple of int
        First video frame of each run.
    runs : list of ndarray of shape (length, Y, X), float32

    Raises
    ------
    InputFileError
        If the video cannot be read.
    """
    starts = tuple(sorted({min(max(int(c) - length // 2, 0), source.n_frames - length)
                           for c in centres}))
    return starts, [correction.apply(source.read(s, s + length)) for s in starts]


def _cells(model: PSFModel, runs: Sequence[np.ndarray], noise: FrameNoise, unit: float,
           weights: Sequence[float], stage: int, tv: float, l1: float, iterations: int,
           settings: SolverSettings, compute: ComputeSettings, client: Any
           ) -> list[TemporalCell]:
    calls = [(run, tv, l1, w * unit, iterations, settings) for w in weights for run in runs]
    solved: list[InterleavedSolve] = run_calls(solve_interleaved, model, calls, compute,
                                               client=client)
    expected = sum(noise.expected_residual_energy(f) for run in runs for f in run[0::2])
    held_noise = [float(noise.variance(f).sum()) for run in runs for f in run[1::2]]
    n_pixels = float(np.prod(model.shape_out))
    cells = []
    for k, w in enumerate(weights):
        results = solved[k * len(runs):(k + 1) * len(runs)]
        held = [e for r in results for e in r.holdout_energy]
        cells.append(TemporalCell(
            weight_units=float(w), weight=float(w * unit), stage=stage,
            discrepancy=sum(r.residual_energy for r in results) / expected,
            prediction_errors=tuple((e - n) / n_pixels
                                    for e, n in zip(held, held_noise, strict=True)),
            volumes=np.stack([r.volumes for r in results]),
            seconds=float(sum(r.seconds for r in results))))
    return cells


def _choose(cells: Sequence[TemporalCell], margin: float) -> tuple[int, int, float]:
    """(chosen, lowest-error, discrepancy limit) by the rules of the module notes."""
    rho = np.array([c.discrepancy for c in cells])
    error = np.array([c.mean_prediction_error for c in cells])
    finite = np.isfinite(rho) & np.isfinite(error)
    if not finite.any():
        raise DataError("every reconstruction of the temporal sweep failed (NaN scores); "
                        "check the model and the frames")
    limit = max(1.0, float(rho[finite].min())) + margin
    admissible = np.flatnonzero(finite & (rho <= limit))
    best = int(admissible[np.argmin(error[admissible])])
    lowest = np.asarray(cells[best].prediction_errors)

    def close(i: int) -> bool:
        gap = np.asarray(cells[i].prediction_errors) - lowest
        stderr = float(np.std(gap, ddof=1)) / math.sqrt(gap.size) if gap.size > 1 else 0.0
        return float(gap.mean()) <= stderr

    chosen = min((int(i) for i in admissible if close(int(i))),
                 key=lambda i: cells[i].weight_units)
    return chosen, best, limit


def _next_weights(cells: Sequence[TemporalCell], best: int) -> list[float]:
    done = {round(c.weight_units, 12) for c in cells}
    centre = cells[best].weight_units
    positive = sorted(c.weight_units for c in cells if c.weight_units > 0)
    around = {0.0, positive[0] / FINE_STEP} if centre == 0 else \
        {centre / FINE_STEP, centre * FINE_STEP}
    return sorted(w for w in around if round(w, 12) not in done)


def sweep_temporal_weight(model: PSFModel, runs: Sequence[np.ndarray], noise: FrameNoise, *,
                          tv: float, l1: float, iterations: int, settings: SolverSettings,
                          compute: ComputeSettings, run_frames: Sequence[int] = (),
                          client: Any = None, margin: float = DISCREPANCY_MARGIN
                          ) -> TemporalSweep:
    """Choose ``temporal_weight`` by the held-out rule of the module notes.

    Parameters
    ----------
    model : PSFModel
        On its device with its FFT threads.
    runs : sequence of ndarray of shape (2m − 1, Y, X)
        Runs of consecutive corrected frames (see :func:`read_runs`), m ≥ 2.
    noise : FrameNoise
        Noise of the corrected frames.
    tv, l1 : float
        Per-frame weights (already chosen).
    iterations : int
        Iteration limit of each window solve.
    settings : SolverSettings
        The job's settings (``tol``, ``tv_z_weight``).
    compute : ComputeSettings
        Where the solves run (see :func:`volrecon.tune.execute.run_calls`).
    run_frames : sequence of int
        First video frame of each run (for the record).
    client : distributed.Client, optional
    margin : float
        Discrepancy margin (see :data:`volrecon.tune.criteria.DISCREPANCY_MARGIN`).

    Returns
    -------
    TemporalSweep

    Warns
    -----
    VolreconWarning
        When the choice still lies on the upper edge of the grid after the widenings.

    Raises
    ------
    DataError
        If every solve failed.
    """
    unit = float(model.operator_norm_squared())
    common = (tv, l1, iterations, settings, compute, client)
    cells = _cells(model, runs, noise, unit, COARSE_WEIGHT_UNITS, 0, *common)
    stage = 1
    while True:
        chosen, best, limit = _choose(cells, margin)
        weights = _next_weights(cells, best)
        at_edge = cells[best].weight_units == max(c.weight_units for c in cells)
        if not weights or (stage > 1 and not at_edge) or stage > 1 + MAX_WIDENINGS:
            break
        cells = sorted(cells + _cells(model, runs, noise, unit, weights, stage, *common),
                       key=lambda c: c.weight_units)
        stage += 1
    if cells[best].weight_units == max(c.weight_units for c in cells):
        warnings.warn(f"temporal_weight: the best held-out score lies on the upper edge of "
                      f"the grid ({cells[best].weight:.3g}) after widening; the video may "
                      "be static enough for a longer temporal_window", VolreconWarning,
                      stacklevel=2)
    return TemporalSweep(cells=tuple(cells), index=chosen, best_index=best,
                         discrepancy_limit=limit, unit=unit, run_frames=tuple(run_frames),
                         run_length=len(runs[0]))
