"""Reconstruct one frame for a side-by-side look at solver settings (no napari or Qt needed).

With ``temporal_window > 1`` the preview solves the window of that many frames centred on the
frame (clamped to the video) with the temporal prior and shows the frame's own volume: the
same solve a job runs, though a job's windows start where its chains and cuts put them.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import DataError, ShapeError
from volrecon.solvers import SolverSettings, reconstruct_window, solve_frame

if TYPE_CHECKING:
    from volrecon.io.correct import FrameCorrection
    from volrecon.models.base import PSFModel
    from volrecon.solvers.info import SolveInfo

__all__ = ["PreviewResult", "preview_frame", "preview_window", "read_frame", "window_bounds"]


@dataclass(frozen=True, eq=False)
class PreviewResult:
    """Outcome of :func:`preview_frame`.

    Attributes
    ----------
    volume_zyx : ndarray of shape (Z, Y, X), float32
        The reconstruction.
    residual_yx : ndarray of shape (Y, X), float32
        ``b − A v``: the frame minus the model's image of the volume.
    info : SolveInfo
        Iterations, objective, relative residual, seconds.
    settings : SolverSettings
        The settings used.
    """

    volume_zyx: np.ndarray
    residual_yx: np.ndarray
    info: SolveInfo
    settings: SolverSettings


def read_frame(path: str | os.PathLike[str], index: int = 0) -> np.ndarray:
    """Frame `index` of a raw video (TIFF, TIFF glob or zarr) as float32 ``(Y, X)``.

    Raises
    ------
    InputFileError
        If the file cannot be read.
    ShapeError
        If `index` is outside the video.
    """
    from volrecon.io import open_frames

    source = open_frames(path)
    frame: np.ndarray = source.read(index, index + 1)[0].astype(np.float32)
    return frame


def window_bounds(index: int, n_frames: int, window: int) -> tuple[int, int]:
    """Frames ``[start, stop)`` of the window of `window` frames centred on `index`.

    Clamped to ``0..n_frames``; shorter only when the video is.

    Examples
    --------
    >>> window_bounds(5, 100, 4), window_bounds(0, 100, 4), window_bounds(9, 10, 4)
    ((3, 7), (0, 4), (6, 10))
    """
    length = min(window, n_frames)
    start = min(max(index - length // 2, 0), n_frames - length)
    return start, start + length


def preview_window(frames_tyx: Any, model: PSFModel, settings: SolverSettings, *, index: int,
                   correction: FrameCorrection | None = None, threads: int | None = None
                   ) -> PreviewResult:
    """Reconstruct a window of frames with the temporal prior; the result of one of them.

    Parameters
    ----------
    frames_tyx : array_like of shape (W, Y, X)
        Consecutive camera frames. Not modified.
    model : PSFModel
        The PSF model.
    settings : SolverSettings
        ``method = "admm"``; its ``temporal_weight`` is the prior's weight.
    index : int
        Which frame of the window to return (0 to W − 1).
    correction, threads
        As for :func:`preview_frame`.

    Raises
    ------
    ShapeError
        If the (corrected) frames are not on the model's sensor grid, or `index` is outside
        the window.
    DataError
        If a frame is not finite or the solve diverged.
    """
    frames = np.array(frames_tyx, dtype=np.float32)
    if frames.ndim != 3:
        raise ShapeError(f"frames must have 3 axes (T, Y, X); got shape {frames.shape}")
    if not 0 <= index < len(frames):
        raise ShapeError(f"frame {index} is outside the window of {len(frames)} frames")
    if correction is not None:
        frames = correction.apply(frames)
    if frames.shape[1:] != tuple(model.shape_out):
        raise ShapeError(f"frames have shape {frames.shape[1:]} (after correction) but the "
                         f"model's sensor is {tuple(model.shape_out)}; choose a video from the "
                         "model's camera, or set the binning the model was calibrated with")
    if threads is not None:
        model = model.on_device(model.backend.device, threads=threads)
    solved, infos = reconstruct_window(
        frames, model, iterations=settings.iterations, tv=settings.tv, l1=settings.l1,
        tol=settings.tol, tv_z_weight=settings.tv_z_weight,
        temporal_weight=settings.temporal_weight)
    volume = np.asarray(model.backend.to_numpy(solved[index]), dtype=np.float32)
    if not np.all(np.isfinite(volume)):
        raise DataError("the preview window diverged (NaN or Inf in the volume); try other "
                        "settings")
    residual = frames[index] - np.asarray(model.forward(volume), dtype=np.float32)
    return PreviewResult(volume_zyx=volume, residual_yx=residual, info=infos[index],
                         settings=settings)


def preview_frame(frame_yx: Any, model: PSFModel, settings: SolverSettings, *,
                  correction: FrameCorrection | None = None, threads: int | None = None
                  ) -> PreviewResult:
    """Reconstruct one frame and its residual image.

    Parameters
    ----------
    frame_yx : array_like of shape (Y, X)
        Camera frame. Not modified.
    model : PSFModel
        The PSF model.
    settings : SolverSettings
        Solver settings, as a job's ``[solver]`` section (the same solve a job runs).
    correction : FrameCorrection, optional
        Dark subtraction, flat field and binning applied first, as a job's ``[video]``
        settings do; the corrected frame must be on the model's sensor grid.
    threads : int, optional
        FFT threads (default: all cores).

    Raises
    ------
    ShapeError
        If the (corrected) frame is not on the model's sensor grid, or does not fit the
        correction's images or binning.
    DataError
        If the frame fails as a job's frame would (not finite, diverged, residual above
        ``settings.max_residual``).
    """
    frame = np.array(frame_yx, dtype=np.float32)
    if frame.ndim != 2:
        raise ShapeError(f"frame must have 2 axes (Y, X); got shape {frame.shape}")
    if correction is not None:
        frame = correction.apply(frame[None])[0]
    if frame.shape != tuple(model.shape_out):
        raise ShapeError(f"frame has shape {frame.shape} (after correction) but the model's "
                         f"sensor is {tuple(model.shape_out)}; choose a frame from the model's "
                         "camera, or set the binning the model was calibrated with")
    if threads is not None:
        model = model.on_device(model.backend.device, threads=threads)
    result = solve_frame(frame, model, settings)
    if result.volume is None or result.info is None:
        raise DataError(f"the preview frame failed: {result.failure}; try other settings "
                        "or another frame")
    volume, info = result.volume, result.info
    residual = frame - np.asarray(model.forward(volume), dtype=np.float32)
    return PreviewResult(volume_zyx=volume, residual_yx=residual, info=info, settings=settings)
