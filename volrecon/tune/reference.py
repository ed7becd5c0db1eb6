"""Scoring against a reference volume: correlation after registration.

A reference (a conventional z-stack of the same sample, or any volume on the model grid)
is never aligned with a reconstruction to the voxel: the sample drifts between the two
recordings and a calibrated PSF is centred by convention, which shifts every
reconstruction by the same amount. The score is therefore the Pearson correlation of the
two volumes, both blurred by the same Gaussian, after the translation that maximises it.

The translation is found by cross-correlation computed with zero-padded FFTs (linear, not
circular, so shifts along a short depth axis do not wrap), refined to a fraction of a voxel
by fitting a parabola through the peak and its two neighbours along each axis (a common
sub-sample peak estimate); the moving volume is then resampled by linear interpolation
(:func:`scipy.ndimage.shift`, ``order=1``). With the blur of ``blur_voxels`` the score is
that of :func:`volrecon.simulate.scoring.blurred_correlation` once the volumes are aligned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft
from scipy.ndimage import gaussian_filter
from scipy.ndimage import shift as nd_shift

from volrecon.errors import DataError, ShapeError

__all__ = ["RegisteredScore", "estimate_volume_shift", "registered_correlation"]


@dataclass(frozen=True)
class RegisteredScore:
    """Correlation of a volume with a reference after alignment.

    Attributes
    ----------
    correlation : float
        Pearson correlation of the aligned, blurred volumes, in [-1, 1].
    shift_zyx : tuple of float
        Translation applied to the volume, voxels (z, y, x).
    """

    correlation: float
    shift_zyx: tuple[float, float, float]


def estimate_volume_shift(reference_zyx: np.ndarray, moving_zyx: np.ndarray, *,
                          max_shift_zyx: tuple[float, float, float] | None = None
                          ) -> tuple[float, float, float]:
    """Shift ``(dz, dy, dx)`` that moves `moving_zyx` onto `reference_zyx` (sub-voxel).

    The 3-D companion of :func:`volrecon.calibrate.estimate_shift` (same argument order):
    the peak of the plain cross-correlation within `max_shift_zyx`, refined by a parabola
    through its neighbours along each axis.

    Parameters
    ----------
    reference_zyx, moving_zyx : ndarray of shape (Z, Y, X)
        Volumes of the same shape.
    max_shift_zyx : tuple of float, optional
        Largest shift searched along each axis, voxels. Default: half of each axis.

    Returns
    -------
    tuple of float
        ``(dz, dy, dx)`` such that ``scipy.ndimage.shift(moving, (dz, dy, dx))`` lines up with
        `reference_zyx`.

    Raises
    ------
    ShapeError
        If the volumes are not 3-D or differ in shape.
    """
    moving = np.asarray(moving_zyx, dtype=np.float64)
    fixed = np.asarray(reference_zyx, dtype=np.float64)
    if moving.ndim != 3 or moving.shape != fixed.shape:
        raise ShapeError(f"volumes must be 3-D (Z, Y, X) of one shape; got {moving.shape} and "
                         f"{fixed.shape}")
    shape = moving.shape
    padded = tuple(sp_fft.next_fast_len(2 * n - 1, real=True) for n in shape)
    a = sp_fft.rfftn(fixed - fixed.mean(), padded)
    b = sp_fft.rfftn(moving - moving.mean(), padded)
    correlation = sp_fft.irfftn(a * np.conj(b), padded)
    limits = [n // 2 if max_shift_zyx is None else int(np.floor(m))
              for n, m in zip(shape, max_shift_zyx or shape, strict=True)]
    # Entry k (or P − k) of the circular correlation of zero-padded inputs is shift +k (−k).
    offsets = [np.arange(-limit, limit + 1) for limit in limits]
    window = correlation[np.ix_(*[np.mod(o, p) for o, p in zip(offsets, padded, strict=True)])]
    peak = np.unravel_index(int(np.argmax(window)), window.shape)
    result = []
    for axis, (index, o) in enumerate(zip(peak, offsets, strict=True)):
        shift = float(o[index])
        if 0 < index < len(o) - 1:
            left, right = list(peak), list(peak)
            left[axis] -= 1
            right[axis] += 1
            y0, y1, y2 = window[tuple(left)], window[peak], window[tuple(right)]
            curvature = y0 - 2 * y1 + y2
            if curvature < 0:
                shift += float(np.clip(0.5 * (y0 - y2) / curvature, -0.5, 0.5))
        result.append(shift)
    return (result[0], result[1], result[2])


def registered_correlation(volume_zyx: np.ndarray, reference_zyx: np.ndarray, *,
                           blur_voxels: float = 1.0,
                           max_shift_zyx: tuple[float, float, float] | None = None
                           ) -> RegisteredScore:
    """Pearson correlation of a volume with a reference after registration.

    Parameters
    ----------
    volume_zyx : ndarray of shape (Z, Y, X)
        Reconstruction.
    reference_zyx : ndarray of shape (Z, Y, X)
        Reference volume on the same grid.
    blur_voxels : float
        σ of the Gaussian applied to both before correlating, voxels (≥ 0); a
        reconstruction cannot beat the instrument's resolution, so voxel-exact comparison
        understates it.
    max_shift_zyx : tuple of float, optional
        Largest translation searched, voxels. Default: half of each axis.

    Returns
    -------
    RegisteredScore

    Raises
    ------
    ShapeError
        If the shapes differ or are not 3-D.
    DataError
        If the reference is constant or not finite.
    """
    reference = np.asarray(reference_zyx, dtype=np.float64)
    if not np.all(np.isfinite(reference)) or float(np.ptp(reference)) == 0.0:
        raise DataError("the reference volume is constant or holds NaN/Inf; give a z-stack of "
                        "the sample")
    a = gaussian_filter(np.asarray(volume_zyx, dtype=np.float64), blur_voxels)
    b = gaussian_filter(reference, blur_voxels)
    shift = estimate_volume_shift(b, a, max_shift_zyx=max_shift_zyx)
    aligned = nd_shift(a, shift, order=1, mode="nearest")
    aligned -= aligned.mean()
    b -= b.mean()
    denominator = float(np.sqrt((aligned * aligned).sum() * (b * b).sum()))
    value = float((aligned * b).sum()) / denominator if denominator > 0 else 0.0
    return RegisteredScore(correlation=value, shift_zyx=shift)
