"""A warm-start chain: consecutive frames, each started from the previous frame's state.

The one loop every caller uses (a job's tasks, the estimate, tuning, the napari sample and the
warm-start benchmark), so that what a preview or a tuning run shows is what the job computes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import VolreconError
from volrecon.solvers.reconstruct import reconstruct

if TYPE_CHECKING:
    from collections.abc import Iterable, Iterator

    from volrecon.models.base import PSFModel
    from volrecon.solvers.info import SolveInfo, SolverState
    from volrecon.solvers.settings import SolverSettings

__all__ = ["FrameResult", "solve_chain", "solve_frame"]


@dataclass(frozen=True, eq=False)
class FrameResult:
    """One frame of a chain.

    Attributes
    ----------
    volume : ndarray of shape (Z, Y, X), float32, or None
        The reconstruction (numpy), None when the frame failed.
    info : SolveInfo or None
        The solver's diagnostics (None when the solver refused the frame).
    failure : str or None
        Why the frame failed; None when it succeeded.
    """

    volume: np.ndarray | None
    info: SolveInfo | None
    failure: str | None


def solve_frame(frame_yx: Any, model: PSFModel, settings: SolverSettings, *,
                init: SolverState | None = None) -> FrameResult:
    """Reconstruct one frame and judge the result.

    A frame fails (and never raises) when its pixels are not finite, the solver refuses it,
    the volume or objective is not finite, or the relative residual exceeds
    ``settings.max_residual``.

    Parameters
    ----------
    frame_yx : ndarray of shape (Y, X)
        Corrected camera frame on the model's sensor grid.
    model : PSFModel
        The forward model, already on its device with its FFT threads.
    settings : SolverSettings
    init : SolverState, optional
        Warm start.

    Returns
    -------
    FrameResult
    """
    frame = np.asarray(frame_yx)
    if not np.all(np.isfinite(frame)):
        return FrameResult(None, None, "the corrected frame contains NaN or Inf pixels")
    try:
        # A diverging frame overflows; the result is checked below and the frame marked
        # failed, so numpy's floating-point warnings would only repeat that (or, where
        # warnings are errors, abort the whole job).
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            volume, info = reconstruct(
                frame, model, method=settings.method, iterations=settings.iterations,
                tv=settings.tv, l1=settings.l1, tol=settings.tol,
                tv_z_weight=settings.tv_z_weight, init=init, return_info=True)
    except (VolreconError, ArithmeticError, np.linalg.LinAlgError) as exc:
        return FrameResult(None, None, f"the solver refused the frame: {exc}")
    volume = np.asarray(model.backend.to_numpy(volume), dtype=np.float32)
    if not (np.all(np.isfinite(volume)) and math.isfinite(info.objective)):
        return FrameResult(None, info, "diverged: the volume or objective is NaN or Inf")
    if math.isfinite(info.residual) and info.residual > settings.max_residual:
        return FrameResult(None, info, (f"diverged: relative residual {info.residual:.3g} "
                                        f"exceeds max_residual = {settings.max_residual:g}"))
    return FrameResult(volume, info, None)


def solve_chain(frames_tyx: Iterable[Any], model: PSFModel, settings: SolverSettings
                ) -> Iterator[FrameResult]:
    """Reconstruct consecutive frames of one warm-start chain, in order.

    The first frame starts from scratch; with ``settings.warm_start`` every later frame starts
    from the previous frame's solver state (volume, duals, penalties). After a failed frame the
    chain starts from scratch again, so one bad frame never poisons the rest. The caller
    decides where chains begin (a job: every ``settings.chain_frames`` frames from its first).

    Parameters
    ----------
    frames_tyx : iterable of ndarray (Y, X)
        Corrected frames, consumed lazily.
    model : PSFModel
        The forward model, already on its device with its FFT threads.
    settings : SolverSettings

    Yields
    ------
    FrameResult
        One per frame, in order.

    Examples
    --------
    >>> import numpy as np, volrecon
    >>> from volrecon.solvers import SolverSettings, solve_chain
    >>> psf = np.zeros((2, 16, 16), np.float32); psf[:, 8, 8] = 1.0
    >>> model = volrecon.PSFModel.from_stack(psf, depth_step_um=2.0, pixel_size_um=1.0)
    >>> frames = np.ones((3, 16, 16), np.float32)
    >>> results = list(solve_chain(frames, model, SolverSettings(iterations=20)))
    >>> [r.failure for r in results], results[0].volume.shape
    ([None, None, None], (2, 16, 16))
    """
    state: SolverState | None = None
    for frame in frames_tyx:
        result = solve_frame(frame, model, settings, init=state)
        ok = result.failure is None and result.info is not None
        state = result.info.state if ok and settings.warm_start else None  # type: ignore[union-attr]
        yield result
