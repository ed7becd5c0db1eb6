"""The iteration count: the smallest whose result is within a tolerance of the converged one.

For the chosen weights, consecutive frames are reconstructed as a job's warm-start chain does
(the first from scratch, each later one from the previous frame's solver state), once with
`reference_iterations` per frame (the converged result) and once for each candidate count.
The error of a candidate is the relative change of the blurred volume,
``‖G(v_n − v_ref)‖ / ‖G v_ref‖`` (``G``: Gaussian of σ = 1 voxel, the resolution at which
the sweep is scored), averaged over the chain the way the job's chains weigh it: a job
chain of ``L`` frames has one cold frame and ``L − 1`` warm ones, so the cold error counts
``1/L`` and the mean warm error ``(L − 1)/L``. The chosen count is the smallest candidate
whose error is at most `tolerance`, trying the counts in increasing order; if none is, the
largest candidate is taken and the report says so. Candidates run with the job's own
stopping rule (``tol``), as the job will; the converged chain runs with ``tol = 0``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from volrecon.errors import ConfigError
from volrecon.tune.criteria import blurred_relative_change

__all__ = ["IterationCheck", "candidate_counts", "chain_error"]

#: Candidate counts, tried in order until one is within the tolerance.
LADDER = (10, 20, 40, 80, 120, 160, 240, 320)


@dataclass(frozen=True)
class IterationCheck:
    """Errors of candidate iteration counts against the converged chain.

    Attributes
    ----------
    counts : tuple of int
        Candidate iteration counts tried, ascending (the search stops at the first count
        within the tolerance).
    errors : tuple of float
        Job-weighted relative error of each candidate (see the module notes).
    cold_errors, warm_errors : tuple of float
        Error of the chain's first frame and mean error of its warm frames.
    reference_iterations : int
        Iterations per frame of the converged chain.
    tolerance : float
        Largest accepted error.
    chain_frames : int
        Frames per warm-start chain of the job (the weighting).
    chosen : int
        The chosen count.
    within_tolerance : bool
        False when no candidate met the tolerance.
    """

    counts: tuple[int, ...]
    errors: tuple[float, ...]
    cold_errors: tuple[float, ...]
    warm_errors: tuple[float, ...]
    reference_iterations: int
    tolerance: float
    chain_frames: int
    chosen: int
    within_tolerance: bool


def candidate_counts(max_iterations: int) -> tuple[int, ...]:
    """The counts of :data:`LADDER` below `max_iterations`, then `max_iterations` itself.

    Raises
    ------
    ConfigError
        If `max_iterations` is below 1.
    """
    if max_iterations < 1:
        raise ConfigError(f"the largest iteration count must be at least 1; got {max_iterations}")
    return (*(n for n in LADDER if n < max_iterations), int(max_iterations))


def chain_error(chains: Sequence[np.ndarray], references: Sequence[np.ndarray], *,
                chain_frames: int) -> tuple[float, float, float]:
    """Job-weighted, cold and warm relative error of candidate chains (means over sites).

    Parameters
    ----------
    chains, references : sequence (per site) of ndarray of shape (T, Z, Y, X)
        Candidate chains and the converged chains of the same frames.
    chain_frames : int
        Warm-start chain length of the job (1: no warm start).

    Returns
    -------
    total, cold, warm : float
    """
    site_cold, site_warm = [], []
    for volumes, reference in zip(chains, references, strict=True):
        changes = [blurred_relative_change(v, r) for v, r in zip(volumes, reference,
                                                                  strict=True)]
        site_cold.append(changes[0])
        site_warm.append(float(np.mean(changes[1:])) if len(changes) > 1 else changes[0])
    cold, warm = float(np.mean(site_cold)), float(np.mean(site_warm))
    weight_cold = 1.0 / max(chain_frames, 1)
    return weight_cold * cold + (1.0 - weight_cold) * warm, cold, warm
