"""The reconstructions a tuning run needs, as module-level functions dask can ship anywhere.

:func:`solve_site` reconstructs the middle frame of a run of three and measures its data
residual and its error in predicting the two neighbouring frames; :func:`solve_chain`
reconstructs consecutive frames with warm start, as a job's chain does.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel

__all__ = ["SiteSolve", "SolverCall", "solve_chain", "solve_site"]


@dataclass(frozen=True)
class SolverCall:
    """Solver arguments shared by the calls of one sweep (pickles with each task).

    Attributes
    ----------
    method : str
        "admm", "fista" or "rl".
    tol : float
        Stopping tolerance of the solver.
    tv_z_weight : float
        Depth weight of TV.
    device : str
        "cpu" or "gpu".
    threads : int or None
        FFT threads per call.
    """

    method: str
    tol: float
    tv_z_weight: float
    device: str
    threads: int | None


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


def _reconstruct(model: PSFModel, frame: np.ndarray, tv: float, l1: float, iterations: int,
                 call: SolverCall, init: object) -> tuple[np.ndarray, object, int]:
    from volrecon.solvers import reconstruct

    volume, info = reconstruct(frame, model, method=call.method, iterations=int(iterations),
                               tv=float(tv), l1=float(l1), tol=call.tol,
                               tv_z_weight=call.tv_z_weight, init=init, device=call.device,
                               threads=call.threads, return_info=True)
    return np.asarray(model.backend.to_numpy(volume), dtype=np.float32), info.state, \
        int(info.iterations)


def solve_site(model: PSFModel, frames_3yx: np.ndarray, tv: float, l1: float,
               iterations: int, call: SolverCall) -> SiteSolve:
    """Reconstruct frame 1 of three consecutive corrected frames from scratch and score it.

    Parameters
    ----------
    model : PSFModel
    frames_3yx : ndarray of shape (3, Y, X), float32
        Corrected frames ``t − 1, t, t + 1``.
    tv, l1 : float
        Regularisation weights.
    iterations : int
        Iteration limit.
    call : SolverCall

    Returns
    -------
    SiteSolve
    """
    start = time.perf_counter()
    frame = np.ascontiguousarray(frames_3yx[1], dtype=np.float32)
    volume, _, n_iter = _reconstruct(model, frame, tv, l1, iterations, call, None)
    predicted = np.asarray(model.forward(volume), dtype=np.float64)
    residual = predicted - frame
    holdout = predicted - 0.5 * (frames_3yx[0].astype(np.float64) + frames_3yx[2])
    return SiteSolve(volume=volume, residual_energy=float(np.vdot(residual, residual)),
                     holdout_energy=float(np.vdot(holdout, holdout)), iterations=n_iter,
                     seconds=time.perf_counter() - start)


def solve_chain(model: PSFModel, frames_tyx: np.ndarray, tv: float, l1: float,
                iterations: int, call: SolverCall) -> np.ndarray:
    """Reconstruct consecutive frames, each warm-started from the previous one's state.

    The first frame starts from scratch, as the first frame of a job's warm-start chain.

    Returns
    -------
    ndarray of shape (T, Z, Y, X), float32
    """
    volumes = np.empty((len(frames_tyx), *model.shape_in), dtype=np.float32)
    state: object = None
    for t, frame in enumerate(frames_tyx):
        volumes[t], state, _ = _reconstruct(model, np.ascontiguousarray(frame, np.float32),
                                            tv, l1, iterations, call, state)
    return volumes
