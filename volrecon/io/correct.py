"""Camera corrections applied to raw frames on ingest: dark offset, hot pixels, flat field,
binning."""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from volrecon.errors import DataError, ShapeError

__all__ = ["FrameCorrection"]


@dataclass(frozen=True, eq=False)
class FrameCorrection:
    """Turn raw camera frames into float32 frames on the model grid.

    ``corrected = bin(repair(raw - dark) / gain)`` where ``gain = (flat - dark) /
    mean(flat - dark)`` (the flat field normalised to mean 1), ``repair`` replaces each listed
    hot pixel by the median of its 8 neighbours (mirrored at the edges), and ``bin`` averages
    ``binning × binning`` blocks.

    Attributes
    ----------
    dark_yx : ndarray of shape (Y, X), float32, or None
        Camera offset image (the mean of frames taken with the light off).
    gain_yx : ndarray of shape (Y, X), float32, or None
        Normalised flat field (mean 1); pixels are divided by it.
    binning : int
        Block size of the lateral binning (1 = none).
    hot_pixels_yx : ndarray of shape (H, 2), int64, or None
        Raw-grid ``(y, x)`` of the pixels to repair (see
        :func:`volrecon.io.checks.find_hot_pixels`); None repairs none.
    """

    dark_yx: np.ndarray | None = None
    gain_yx: np.ndarray | None = None
    binning: int = 1
    hot_pixels_yx: np.ndarray | None = None

    def with_hot_pixels(self, hot_pixels_yx: np.ndarray) -> FrameCorrection:
        """A copy that also repairs the raw pixels `hot_pixels_yx` (shape (H, 2))."""
        pixels = np.array(hot_pixels_yx, dtype=np.int64).reshape(-1, 2)
        pixels.setflags(write=False)
        return replace(self, hot_pixels_yx=pixels)

    @classmethod
    def build(cls, *, dark_yx: np.ndarray | None = None, flat_yx: np.ndarray | None = None,
              binning: int = 1, name_dark: str = "dark", name_flat: str = "flat"
              ) -> FrameCorrection:
        """Check the calibration images and prepare the correction.

        Parameters
        ----------
        dark_yx, flat_yx : ndarray of shape (Y, X), optional
            Dark (offset) and flat-field images at the camera's full resolution.
        binning : int
            Lateral block size, at least 1.
        name_dark, name_flat : str
            How to name the images in error messages (their file paths).

        Raises
        ------
        ShapeError
            If the images are not 2-D or differ in shape.
        DataError
            If an image is not finite, or the dark-subtracted flat field is not positive
            everywhere.
        """
        if binning < 1:
            raise ShapeError(f"binning must be at least 1; got {binning}")
        dark = None if dark_yx is None else np.array(dark_yx, dtype=np.float32)
        gain = None
        for name, image in ((name_dark, dark), (name_flat, flat_yx)):
            if image is None:
                continue
            if np.ndim(image) != 2:
                raise ShapeError(f"{name}: has shape {np.shape(image)}; expected one 2-D image")
            if not np.all(np.isfinite(image)):
                raise DataError(f"{name}: contains NaN or Inf; use a clean calibration image")
        if flat_yx is not None:
            flat = np.array(flat_yx, dtype=np.float64)
            if dark is not None:
                if dark.shape != flat.shape:
                    raise ShapeError(
                        f"{name_flat}: has shape {flat.shape} but {name_dark} {dark.shape}; "
                        "both must be taken with the camera settings of the video"
                    )
                flat = flat - dark
            if not np.all(flat > 0):
                raise DataError(
                    f"{name_flat}: {int(np.sum(flat <= 0))} pixels are zero or negative after "
                    "dark subtraction; record the flat field with more light"
                )
            gain = (flat / flat.mean()).astype(np.float32)
        return cls(dark_yx=dark, gain_yx=gain, binning=int(binning))

    @property
    def frame_shape_yx(self) -> tuple[int, int] | None:
        """Raw frame shape the calibration images require (None: any)."""
        for image in (self.dark_yx, self.gain_yx):
            if image is not None:
                return (int(image.shape[0]), int(image.shape[1]))
        return None

    def output_shape(self, raw_shape_yx: tuple[int, int]) -> tuple[int, int]:
        """Shape of a corrected frame for a raw frame of `raw_shape_yx`."""
        ny, nx = raw_shape_yx
        return (ny // self.binning, nx // self.binning)

    def check_shape(self, raw_shape_yx: tuple[int, int], *, where: str) -> None:
        """Raise ShapeError unless raw frames of this shape can be corrected."""
        required = self.frame_shape_yx
        if required is not None and tuple(raw_shape_yx) != required:
            raise ShapeError(
                f"{where}: frames have shape {tuple(raw_shape_yx)} but the dark/flat images "
                f"{required}; use calibration images from the same camera settings"
            )
        ny, nx = raw_shape_yx
        if ny % self.binning or nx % self.binning:
            raise ShapeError(
                f"{where}: frames of shape {(ny, nx)} cannot be binned by {self.binning}; "
                "choose a binning that divides both sides"
            )

    def apply(self, frames_tyx: Any) -> np.ndarray:
        """Correct raw frames; returns a new float32 ``(T, Y // binning, X // binning)`` array."""
        out = np.array(frames_tyx, dtype=np.float32)
        if out.ndim != 3:
            raise ShapeError(f"frames must have 3 axes (T, Y, X); got shape {out.shape}")
        self.check_shape(out.shape[1:], where="frames")
        if self.dark_yx is not None:
            out -= self.dark_yx
        if self.hot_pixels_yx is not None and len(self.hot_pixels_yx):
            _repair_pixels(out, self.hot_pixels_yx)
        if self.gain_yx is not None:
            out /= self.gain_yx
        b = self.binning
        if b > 1:
            t, ny, nx = out.shape
            out = out.reshape(t, ny // b, b, nx // b, b).mean(axis=(2, 4), dtype=np.float32)
        return out


def _repair_pixels(frames_tyx: np.ndarray, pixels_yx: np.ndarray) -> None:
    """Replace, in place, each listed pixel of every frame by the median of its 8 neighbours
    (indices mirrored at the edges, so a border pixel never counts itself)."""
    _, ny, nx = frames_tyx.shape
    offsets = np.array([(dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1) if dy or dx])
    ys = _mirror(pixels_yx[:, 0, None] + offsets[None, :, 0], ny)
    xs = _mirror(pixels_yx[:, 1, None] + offsets[None, :, 1], nx)
    neighbours = frames_tyx[:, ys, xs]  # (T, H, 8)
    frames_tyx[:, pixels_yx[:, 0], pixels_yx[:, 1]] = np.median(neighbours, axis=-1)


def _mirror(index: np.ndarray, n: int) -> np.ndarray:
    if n == 1:
        return np.zeros_like(index)
    index = np.abs(index)
    return np.where(index > n - 1, 2 * (n - 1) - index, index)
