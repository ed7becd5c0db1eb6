"""The reconstructions a tuning run needs, as module-level functions dask can ship anywhere.

:func:`solve_site` reconstructs the middle frame of a run of three and measures its data
residual and its error in predicting the two neighbouring frames; :func:`solve_chain`
reconstructs consecutive frames with warm start, as a job's chain does.
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.solvers import reconstruct
from volrecon.solvers import solve_chain as chain
from volrecon.solvers.norms import squared_norm

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel
    from volrecon.solvers import SolverSettings

__all__ = ["SiteSolve", "solve_chain", "solve_site"]


@dataclass(frozen=True)
class SiteSolve:
    """One setting on one site.

    Attributes
    ----------
    volume : ndarray of shape (Z, Y, X), float32
        Reconstruction of the site's middle frame.
    residual_energy : float
        ``‖A v − b‖²`` against the frame itself.
    holdout_energy : float
        ``‖A v − (b₋ + b₊)/2‖²`` against the mean of the frames before and after.
    iterations : int
        Iterations the solver ran.
    seconds : float
        Wall-clock time of the solve.
    """

    volume: np.ndarray
    residual_energy: float
    holdout_energy: float
    iterations: int
    seconds: float


def _with(settings: SolverSettings, tv: float, l1: float, iterations: int) -> SolverSettings:
    return dataclasses.replace(settings, tv=float(tv), l1=float(l1), iterations=int(iterations))


def solve_site(model: PSFModel, frames_3yx: np.ndarray, tv: float, l1: float,
               iterations: int, settings: SolverSettings) -> SiteSolve:
    """Reconstruct frame 1 of three consecutive corrected frames from scratch and score it.

    Parameters
    ----------
    model : PSFModel
        On its device with its FFT threads.
    frames_3yx : ndarray of shape (3, Y, X), float32
        Corrected frames ``t − 1, t, t + 1``.
    tv, l1 : float
        Regularisation weights.
    iterations : int
        Iteration limit.
    settings : SolverSettings
        The job's solver settings (its `tv`, `l1` and `iterations` are replaced).

    Returns
    -------
    SiteSolve
    """
    start = time.perf_counter()
    frame = np.ascontiguousarray(frames_3yx[1], dtype=np.float32)
    site = _with(settings, tv, l1, iterations)
    solved, info = reconstruct(frame, model, method=site.method, iterations=site.iterations,
                               tv=site.tv, l1=site.l1, tol=site.tol,
                               tv_z_weight=site.tv_z_weight, return_info=True)
    volume = np.asarray(model.backend.to_numpy(solved), dtype=np.float32)
    n_iter = int(info.iterations)
    predicted = np.asarray(model.forward(volume), dtype=np.float64)
    residual = predicted - frame
    holdout = predicted - 0.5 * (frames_3yx[0].astype(np.float64) + frames_3yx[2])
    return SiteSolve(volume=volume, residual_energy=squared_norm(residual),
                     holdout_energy=squared_norm(holdout), iterations=n_iter,
                     seconds=time.perf_counter() - start)


def solve_chain(model: PSFModel, frames_tyx: np.ndarray, tv: float, l1: float,
                iterations: int, settings: SolverSettings) -> np.ndarray:
    """Reconstruct consecutive frames as one warm-start chain of a job does.

    Runs :func:`volrecon.solvers.solve_chain` with the job's settings (its `tv`, `l1` and
    `iterations` replaced); a frame the job would record as failed is NaN here.

    Returns
    -------
    ndarray of shape (T, Z, Y, X), float32
    """
    volumes = np.full((len(frames_tyx), *model.shape_in), np.nan, dtype=np.float32)
    frames = (np.ascontiguousarray(frame, np.float32) for frame in frames_tyx)
    for t, result in enumerate(chain(frames, model, _with(settings, tv, l1, iterations))):
        if result.volume is not None:
            volumes[t] = result.volume
    return volumes
