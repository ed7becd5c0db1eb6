"""Sanity checks of a video before any work: its offset against the dark, and hot pixels.

A job reads a few frames spread over its range (:func:`sample_frames`) and checks them here:
:func:`check_offset` refuses frames that lie mostly below the dark frame (a dark from other
camera settings) and warns when the offset looks subtracted twice, too high or not at all;
:func:`find_hot_pixels` finds the fixed single-pixel spikes that a missing dark leaves in
every frame.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import scipy.ndimage

from volrecon.errors import DataError, FrameOffsetWarning
from volrecon.io.frames import FrameSource

__all__ = [
    "HOT_PIXEL_ISOLATION",
    "HOT_PIXEL_SIGMA",
    "OffsetFigures",
    "check_offset",
    "find_hot_pixels",
    "measure_offset",
    "noise_sigma",
    "sample_frames",
]

#: Frames a job samples for its checks (spread evenly over its range).
SAMPLED_FRAMES = 5

#: Factor from the median absolute deviation to the standard deviation of Gaussian noise.
_MAD_TO_SIGMA = 1.4826

#: Footprint of the 8 neighbours of a pixel.
_RING = np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]], dtype=bool)

# Thresholds. With a correct dark, noise puts about half of the dark pixels below zero and
# light only adds, so the fraction below zero stays near or under 0.5; 0.8 is met when the
# offset is too high by about 0.85 noise sigma. Refusing needs more: nearly every pixel
# (0.95) below, the median more than 5 sigma below (a dark of other camera settings, e.g. a
# 16-bit dark for an 8-bit video, is hundreds of sigma off).
#: Fraction of pixels below zero after the dark above which the offset is reported.
NEGATIVE_WARN_FRACTION = 0.8
#: Fraction below zero, and median deficit in noise sigma, at which frames are refused.
NEGATIVE_REFUSE_FRACTION = 0.95
MEDIAN_REFUSE_SIGMA = 5.0
#: A video whose own pixels are negative this often was offset-subtracted already (raw camera
#: counts are never negative).
ALREADY_SUBTRACTED_FRACTION = 0.05
#: Without a dark: an offset is reported when the darkest 1 % of pixels sit this many noise
#: sigma above zero and the darkest quarter spans at most 3 sigma (a flat pedestal, unlike
#: scene light, which varies over the sensor).
PEDESTAL_SIGMA = 10.0
PEDESTAL_FLATNESS_SIGMA = 3.0

#: Hot pixel: more than this many noise sigma above the median of its 8 neighbours ...
HOT_PIXEL_SIGMA = 8.0
#: ... and its brightest neighbour (above the pedestal) under this fraction of it. A lens or
#: diffuser image is band-limited: where the PSF is sampled at all (Gaussian sigma above
#: about 0.56 px) no pixel outshines all its neighbours five-fold; hot pixels do.
HOT_PIXEL_ISOLATION = 0.2


def sample_frames(source: FrameSource, first: int, n_frames: int, *,
                  count: int = SAMPLED_FRAMES) -> np.ndarray:
    """Read up to `count` frames spread evenly over ``first : first + n_frames``.

    Returns
    -------
    ndarray of shape (N, Y, X)
        The frames in the stored dtype, N = min(count, n_frames).
    """
    picks = np.unique(np.linspace(first, first + n_frames - 1, min(count, n_frames))
                      .round().astype(int))
    return np.concatenate([source.read(int(t), int(t) + 1) for t in picks])


def noise_sigma(image_yx: np.ndarray) -> float:
    """Robust noise of an image from neighbouring-pixel differences: 1.4826·MAD / √2.

    Structure (light, PSF edges) moves few differences, so the median keeps to the noise.
    Returns at least half a count for integer-like data (quantisation) and never 0.
    """
    finite = image_yx[np.isfinite(image_yx)]
    diffs = np.diff(np.where(np.isfinite(image_yx), image_yx, np.nan), axis=-1).ravel()
    diffs = diffs[np.isfinite(diffs)]
    sigma = (_MAD_TO_SIGMA * float(np.median(np.abs(diffs - np.median(diffs)))) / np.sqrt(2.0)
             if diffs.size else 0.0)
    scale = float(np.max(np.abs(finite))) if finite.size else 1.0
    floor = max(1e-6 * scale, 1e-30)
    if finite.size and np.all(finite == np.round(finite)):
        floor = max(floor, 0.5)
    return max(sigma, floor)


@dataclass(frozen=True)
class OffsetFigures:
    """What :func:`measure_offset` found in the sampled frames.

    Attributes
    ----------
    negative_fraction : float
        Fraction of finite pixels below zero after the dark (the raw pixels without one).
    raw_negative_fraction : float
        Fraction of the video's own pixels below zero.
    median : float
        Median pixel after the dark, counts.
    low_1, low_25 : float
        1st and 25th percentiles of the temporal-median frame after the dark, counts.
    sigma : float
        Noise of one frame (:func:`noise_sigma`), counts.
    raw_max : float
        Largest raw pixel value.
    dark_median : float or None
        Median of the dark frame.
    """

    negative_fraction: float
    raw_negative_fraction: float
    median: float
    low_1: float
    low_25: float
    sigma: float
    raw_max: float
    dark_median: float | None


def measure_offset(frames_tyx: np.ndarray, dark_yx: np.ndarray | None) -> OffsetFigures:
    """Measure the offset figures of raw frames (see :class:`OffsetFigures`)."""
    raw = np.asarray(frames_tyx, dtype=np.float64)
    finite = np.isfinite(raw)
    corrected = raw - dark_yx if dark_yx is not None else raw
    values = corrected[finite]
    if values.size == 0:
        nan = float("nan")
        return OffsetFigures(0.0, 0.0, nan, nan, nan, 1.0, nan, None)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN pixels give NaN medians
        still = np.nanmedian(np.where(finite, corrected, np.nan), axis=0)
    low_1, low_25 = np.nanpercentile(still, [1.0, 25.0])
    return OffsetFigures(
        negative_fraction=float(np.mean(values < 0)),
        raw_negative_fraction=float(np.mean(raw[finite] < 0)),
        median=float(np.median(values)),
        low_1=float(low_1), low_25=float(low_25),
        sigma=noise_sigma(corrected[0]),
        raw_max=float(raw[finite].max()),
        dark_median=None if dark_yx is None else float(np.median(dark_yx)),
    )


def check_offset(frames_tyx: np.ndarray, dark_yx: np.ndarray | None, *, video: str,
                 dark: str | None = None) -> OffsetFigures:
    """Refuse frames mostly below the dark; warn when the offset looks wrong.

    Parameters
    ----------
    frames_tyx : ndarray of shape (N, Y, X)
        A few raw frames (:func:`sample_frames`).
    dark_yx : ndarray of shape (Y, X), optional
        The dark frame the job subtracts.
    video, dark : str
        Names of the video and the dark file, for messages.

    Returns
    -------
    OffsetFigures

    Raises
    ------
    DataError
        If the video's own pixels are not negative (camera counts), yet after the dark at
        least 95 % of them are below zero and the median lies more than 5 noise sigma
        below: the dark comes from other camera settings.

    Warns
    -----
    FrameOffsetWarning
        If more than 80 % of the pixels are below zero after the dark (subtracted twice,
        or too high), or, without a dark, the frames sit on a flat pedestal far above zero
        (a camera offset that nothing subtracts).
    """
    figures = measure_offset(frames_tyx, dark_yx)
    f = figures
    below = f"{f.negative_fraction:.0%} of the sampled pixels are below zero"
    if dark_yx is not None:
        below += f" after subtracting the dark {dark}"
        camera_counts = f.raw_negative_fraction < ALREADY_SUBTRACTED_FRACTION
        if (camera_counts and f.negative_fraction >= NEGATIVE_REFUSE_FRACTION
                and f.median < -MEDIAN_REFUSE_SIGMA * f.sigma):
            raise DataError(
                f"{video}: {below} (median {f.median:.4g} counts; the video reaches "
                f"{f.raw_max:.4g}, the dark's median is {f.dark_median:.4g}), so every volume "
                "would be empty; the dark was recorded with other camera settings (bit "
                "depth, gain, offset): record one with the video's settings, or remove "
                "[video] dark"
            )
        if f.negative_fraction > NEGATIVE_WARN_FRACTION:
            cause = (f"the video itself is {f.raw_negative_fraction:.0%} negative, so it was "
                     "offset-subtracted already and the dark is subtracted twice: remove "
                     "[video] dark" if not camera_counts else
                     f"the dark is higher than the video's offset (median {f.median:.3g} "
                     "counts): record the dark with the video's exposure, gain and "
                     "temperature")
            warnings.warn(f"{video}: {below}; nonnegative volumes cannot explain that and "
                          f"lose light; likely cause: {cause}", FrameOffsetWarning,
                          stacklevel=2)
    elif f.negative_fraction > NEGATIVE_WARN_FRACTION:
        warnings.warn(f"{video}: {below} and no [video] dark is given; nonnegative volumes "
                      "cannot explain that and lose light; likely cause: the video was "
                      "offset-subtracted with too large an offset", FrameOffsetWarning,
                      stacklevel=2)
    elif (f.low_1 > PEDESTAL_SIGMA * f.sigma
          and f.low_25 - f.low_1 < PEDESTAL_FLATNESS_SIGMA * f.sigma):
        warnings.warn(
            f"{video}: no [video] dark is given, but the darkest pixels sit on a flat "
            f"pedestal of about {f.low_1:.4g} counts ({f.low_1 / f.sigma:.0f} times the noise "
            f"of {f.sigma:.3g}; {f.negative_fraction:.0%} of pixels below zero): a camera "
            "offset, which the volumes would explain as haze; set [video] dark to a dark "
            "frame (the mean of frames taken with the light off)",
            FrameOffsetWarning, stacklevel=2)
    return figures


def find_hot_pixels(frames_tyx: np.ndarray, *, dark_yx: np.ndarray | None = None,
                    sigma: float = HOT_PIXEL_SIGMA,
                    isolation: float = HOT_PIXEL_ISOLATION) -> np.ndarray:
    """Pixels that stay far above all their neighbours in a few frames: hot pixels.

    The temporal median of the (dark-subtracted) frames keeps what is fixed in every frame
    (hot pixels) and drops what moves or flickers (noise, cosmic rays). A pixel is hot when it
    exceeds the median of its 8 neighbours by more than `sigma` times the robust noise of
    that difference (1.4826·MAD) *and* its brightest neighbour is below `isolation` times
    its own value, both above the frame's pedestal (its 1st percentile).

    Parameters
    ----------
    frames_tyx : ndarray of shape (N, Y, X)
        A few raw frames; non-finite pixels are ignored.
    dark_yx : ndarray of shape (Y, X), optional
        Subtracted first.
    sigma : float
        Threshold in noise sigma (> 0).
    isolation : float
        Largest ratio of the brightest neighbour to the pixel, in (0, 1).

    Returns
    -------
    ndarray of shape (H, 2), int64
        ``(y, x)`` of each hot pixel, in row-major order.
    """
    raw = np.asarray(frames_tyx, dtype=np.float64)
    if dark_yx is not None:
        raw = raw - dark_yx
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN pixels give NaN medians
        still = np.nanmedian(np.where(np.isfinite(raw), raw, np.nan), axis=0)
    valid = np.isfinite(still)
    if not valid.any():
        return np.zeros((0, 2), dtype=np.int64)
    pedestal = float(np.percentile(still[valid], 1.0))
    image = np.where(valid, still, pedestal)
    median = scipy.ndimage.median_filter(image, footprint=_RING, mode="mirror")
    brightest = scipy.ndimage.maximum_filter(image, footprint=_RING, mode="mirror")
    residual = image - median
    noise = _MAD_TO_SIGMA * float(np.median(np.abs(residual - np.median(residual))))
    integer_like = bool(np.all(image == np.round(image)))
    noise = max(noise, 0.5 if integer_like else 0.0,
                1e-6 * max(float(np.abs(image).max()), 1e-30))
    hot = (valid & (residual > sigma * noise)
           & (brightest - pedestal < isolation * (image - pedestal)))
    return np.argwhere(hot).astype(np.int64)
