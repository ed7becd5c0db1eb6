"""Reconstruct one frame for a side-by-side look at solver settings (no napari or Qt needed)."""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import ConfigError, ShapeError
from volrecon.solvers import reconstruct
from volrecon.solvers.reconstruct import METHODS

if TYPE_CHECKING:
    from volrecon.io.correct import FrameCorrection
    from volrecon.models.base import PSFModel
    from volrecon.solvers.info import SolveInfo

__all__ = ["PreviewResult", "PreviewSettings", "preview_frame", "read_frame"]


@dataclass(frozen=True)
class PreviewSettings:
    """Solver settings of one preview.

    Attributes
    ----------
    method : {"admm", "fista", "rl"}
    iterations : int
        At least 1.
    tv, l1 : float
        Regularisation weights, >= 0.
    """

    method: str = "admm"
    iterations: int = 50
    tv: float = 0.0
    l1: float = 0.0

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ConfigError(f"method must be one of {', '.join(METHODS)}; got {self.method!r}")
        if self.iterations < 1:
            raise ConfigError(f"iterations must be at least 1; got {self.iterations}")
        if not (self.tv >= 0 and self.l1 >= 0):
            raise ConfigError(f"tv and l1 must be >= 0; got tv={self.tv}, l1={self.l1}")

    def label(self) -> str:
        """Short text naming the settings, e.g. ``"admm 50 it, tv 0.01"``."""
        text = f"{self.method} {self.iterations} it"
        if self.tv:
            text += f", tv {self.tv:g}"
        if self.l1:
            text += f", l1 {self.l1:g}"
        return text


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
    settings : PreviewSettings
        The settings used.
    """

    volume_zyx: np.ndarray
    residual_yx: np.ndarray
    info: SolveInfo
    settings: PreviewSettings


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


def preview_frame(frame_yx: Any, model: PSFModel, settings: PreviewSettings, *,
                  correction: FrameCorrection | None = None, threads: int | None = None
                  ) -> PreviewResult:
    """Reconstruct one frame and its residual image.

    Parameters
    ----------
    frame_yx : array_like of shape (Y, X)
        Camera frame. Not modified.
    model : PSFModel
        The PSF model.
    settings : PreviewSettings
        Solver settings.
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
    volume, info = reconstruct(frame, model, method=settings.method,
                               iterations=settings.iterations, tv=settings.tv, l1=settings.l1,
                               threads=threads, return_info=True)
    volume = np.asarray(volume, dtype=np.float32)
    residual = frame - np.asarray(model.forward(volume), dtype=np.float32)
    return PreviewResult(volume_zyx=volume, residual_yx=residual, info=info, settings=settings)
