"""Turn simulated light into the files a microscope camera writes.

:func:`record_video` images a scene through a PSF model onto a :class:`Camera`;
:func:`record_bead_scan` records a PSF stack the way a lab measures one (a bright bead
stepped through depth, one exposure per step); :func:`write_tiff` stores any of them as a
multi-page TIFF with its axes and sampling in the description.
"""

from __future__ import annotations

import math
import os
from typing import TYPE_CHECKING, Any

import numpy as np
import tifffile

from volrecon.errors import ConfigError, ShapeError

if TYPE_CHECKING:
    from volrecon._typing import FloatArray, RNGLike
    from volrecon.models import PSFModel
    from volrecon.simulate.camera import Camera

__all__ = ["expected_photons", "record_bead_scan", "record_video", "write_tiff"]


def expected_photons(volumes_tzyx: FloatArray, model: PSFModel, *,
                     background_photons: float = 0.0, frames_per_batch: int = 8) -> FloatArray:
    """Mean photons per sensor pixel for each frame: ``A v + background``, (T, Y, X) float32.

    Parameters
    ----------
    volumes_tzyx : ndarray of shape (T, Z, Y, X)
        Photons emitted per voxel per frame, on the model grid.
    model : PSFModel
        Maps emitted photons to photons on the sensor (a simulated PSF plane sums to the
        fraction of light collected).
    background_photons : float
        Uniform background (autofluorescence, stray light) per pixel per frame.
    frames_per_batch : int
        Frames sent through the model at once (bounds memory).

    Returns
    -------
    ndarray of shape (T, Y, X), float32
        Non-negative (tiny negative FFT round-off is set to 0).
    """
    volumes = np.asarray(volumes_tzyx)
    if volumes.ndim != 4:
        raise ShapeError(f"volumes_tzyx must be (T, Z, Y, X); got shape {volumes.shape}")
    if not (math.isfinite(background_photons) and background_photons >= 0):
        raise ConfigError(
            f"background_photons must be a non-negative number; got {background_photons!r}")
    out = np.empty((volumes.shape[0], *model.shape_out), dtype=np.float32)
    for start in range(0, volumes.shape[0], max(1, int(frames_per_batch))):
        stop = start + max(1, int(frames_per_batch))
        out[start:stop] = np.asarray(model.forward(volumes[start:stop]))
    np.maximum(out, 0.0, out=out)
    out += np.float32(background_photons)
    return out


def record_video(volumes_tzyx: FloatArray, model: PSFModel, camera: Camera, *,
                 rng: RNGLike = None, background_photons: float = 0.0) -> np.ndarray:
    """Camera frames of a moving scene: (T, Z, Y, X) photons → (T, Y, X) uint16 counts.

    See :func:`expected_photons` for the optics and :meth:`Camera.expose` for the noise.
    """
    photons = expected_photons(volumes_tzyx, model, background_photons=background_photons)
    return camera.expose(photons, rng=rng)


def record_bead_scan(psf_zyx: FloatArray, camera: Camera, *, bead_photons: float,
                     background_photons: float = 0.0, rng: RNGLike = None) -> np.ndarray:
    """A measured PSF stack: one exposure of a point-like bead per depth step, uint16.

    Parameters
    ----------
    psf_zyx : ndarray of shape (Z, Y, X)
        Fraction of the bead's light reaching each pixel at each depth (a simulated stack,
        possibly of a bead off the axis).
    camera : Camera
        The camera, with the scan's exposure time.
    bead_photons : float
        Photons the bead emits during one exposure.
    background_photons : float
        Uniform background per pixel per exposure.
    rng : numpy Generator, int or None
        Source of the noise.

    Returns
    -------
    ndarray of shape (Z, Y, X), uint16
        Counts with offset, dark current, shot and read noise, hot pixels and quantisation.
    """
    psf = np.asarray(psf_zyx, dtype=np.float64)
    if psf.ndim != 3:
        raise ShapeError(f"psf_zyx must be (Z, Y, X); got shape {psf.shape}")
    if not (math.isfinite(bead_photons) and bead_photons > 0):
        raise ConfigError(f"bead_photons must be a positive number; got {bead_photons!r}")
    if not (math.isfinite(background_photons) and background_photons >= 0):
        raise ConfigError(
            f"background_photons must be a non-negative number; got {background_photons!r}")
    return camera.expose(np.maximum(psf, 0.0) * bead_photons + background_photons, rng=rng)



def write_tiff(path: str | os.PathLike[str], data: np.ndarray, *, axes: str,
               metadata: dict[str, Any] | None = None) -> None:
    """Write an image stack as one multi-page TIFF series with named axes.

    Parameters
    ----------
    path : str or path-like
        Output file (overwritten).
    data : ndarray
        Pixels, e.g. (T, Y, X) uint16 frames; written as given.
    axes : str
        One letter per axis of `data`, ending in ``"YX"`` (e.g. ``"TYX"``, ``"ZYX"``).
    metadata : dict, optional
        Extra JSON-serialisable keys stored with the axes in the image description (read
        back with ``tifffile.TiffFile(path).shaped_metadata[0]``).

    Raises
    ------
    ShapeError
        If `axes` does not have one letter per axis or does not end in ``"YX"``.
    """
    array = np.asarray(data)
    if len(axes) != array.ndim or not axes.endswith("YX") or len(set(axes)) != len(axes):
        raise ShapeError(
            f"{os.fspath(path)}: axes {axes!r} must name each of the {array.ndim} axes of shape "
            f"{array.shape} once and end in 'YX'")
    description = {"axes": axes, **(metadata or {})}
    tifffile.imwrite(path, array, photometric="minisblack", metadata=description)
