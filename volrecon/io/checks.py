"""Sanity checks of a video before any work: its offset against the dark, and hot pixels.

A job reads a few frames spread over its range (:func:`sample_frames`) and checks them here:
:func:`check_offset` refuses frames that lie mostly below the dark frame (a dark from other
camera settings) and warns when the offset looks subtracted twice, too high or not at all;
:func:`find_hot_pixels` finds the fixed single-pixel spikes that a missing dark leaves in
every frame.

Without a dark, a camera offset is found two ways. A flat pedestal under the darkest pixels
gives it away where part of the sensor gets no light (a lens or lenslet image). A diffuser
spreads light over the whole sensor, so nothing is dark; there the offset shows in the noise
instead (:func:`estimate_zero_level`): shot noise grows with the light and the offset adds
none, so the level where the variance would reach zero is the offset.
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
    "estimate_zero_level",
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
#: Without a dark and without a flat pedestal: an offset is reported when the zero-light
#: level of :func:`estimate_zero_level` lies this many noise sigma (of the whole frame,
#: shot noise included) above zero, and at most 3 sigma above the darkest pixels (an offset
#: cannot exceed them; a level above them is a bad fit). On simulated diffuser videos
#: (write_hydrogel_scenario: dense, sparse, dim and bright scenes, gains 0.5 and 2 counts
#: per electron) the level of dark-subtracted frames came out between -1.1 and +1.4 sigma,
#: that of the camera's 100-count offset between 5.2 sigma (gain 2) and 24 sigma (gain 0.5).
ZERO_LEVEL_SIGMA = 4.0
#: Blocks (side in pixels) of the mean-variance fit, the fewest blocks it needs, its bins,
#: and the quantile of the block variances taken per bin (structure only adds variance, so a
#: low quantile keeps to the noise; a bias common to all bins cancels in the zero level).
_BLOCK_PX = 8
_MIN_BLOCKS = 64
_BINS = 8
_VARIANCE_QUANTILE = 0.25
#: The fit must explain the bins (R²) and the shot noise must at least double the variance
#: over the range of means, else the extrapolation to zero variance is not trusted.
_MIN_R_SQUARED = 0.9
_MIN_VARIANCE_RISE = 1.0

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
    zero_level : float or None
        The frames' zero-light level from their noise (:func:`estimate_zero_level`), after
        the dark; None where the noise does not follow shot noise closely enough to tell.
    """

    negative_fraction: float
    raw_negative_fraction: float
    median: float
    low_1: float
    low_25: float
    sigma: float
    raw_max: float
    dark_median: float | None
    zero_level: float | None = None


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
        zero_level=estimate_zero_level(corrected),
    )


def estimate_zero_level(frames_tyx: np.ndarray) -> float | None:
    """The pixel value that zero light would give, from how the noise grows with the light.

    Camera counts are ``y = c + K e + n`` with ``e`` Poisson photo-electrons, so locally
    ``Var[y] = K (E[y] - c) + σ²``: the variance rises linearly with the mean and the offset
    ``c`` adds none (photon transfer [1]_). The frames are cut into 8 × 8 blocks; each gives
    its mean and its noise variance from second differences along x, ``y[x-1] - 2 y[x] +
    y[x+1]`` (variance 6 σ² for white noise; 1.4826·MAD, squared, over 6), which cancel
    smooth light and let less of a diffuser's caustics through than first differences.
    Blocks are grouped by mean into 8 bins of equal count; a straight line through the
    bins' median mean and lower-quartile variance, ``v = K m + d``, reaches zero variance
    at ``m = -d / K``. That is ``c - σ² / K``: below the offset by the read noise in counts
    squared over the gain (about 1 count for a scientific CMOS camera), so it errs low.

    Parameters
    ----------
    frames_tyx : ndarray of shape (N, Y, X)
        A few frames (after any dark); non-finite pixels make their block ignored.

    Returns
    -------
    float or None
        The zero-light level in the frames' units; None with fewer than 64 blocks, or when
        the bins do not follow a rising line (R² under 0.9, or the variance less than
        doubling over the range of means): data without shot noise (simulated, rescaled or
        read-noise limited frames) say nothing about their offset this way.

    References
    ----------
    .. [1] J. R. Janesick, "Photon Transfer: DN → λ", SPIE Press (2007).
    """
    frames = np.asarray(frames_tyx, dtype=np.float64)
    if frames.ndim == 2:
        frames = frames[None]
    n, ny, nx = frames.shape
    by, bx = ny // _BLOCK_PX, nx // _BLOCK_PX
    if n * by * bx < _MIN_BLOCKS:
        return None
    blocks = (frames[:, : by * _BLOCK_PX, : bx * _BLOCK_PX]
              .reshape(n, by, _BLOCK_PX, bx, _BLOCK_PX).transpose(0, 1, 3, 2, 4)
              .reshape(-1, _BLOCK_PX, _BLOCK_PX))
    blocks = blocks[np.isfinite(blocks).all(axis=(1, 2))]
    if blocks.shape[0] < _MIN_BLOCKS:
        return None
    means = blocks.mean(axis=(1, 2))
    diffs = np.diff(blocks, n=2, axis=2).reshape(blocks.shape[0], -1)
    spread = np.median(np.abs(diffs - np.median(diffs, axis=1, keepdims=True)), axis=1)
    variances = (_MAD_TO_SIGMA * spread) ** 2 / 6.0
    order = np.argsort(means)
    bins = np.array_split(order, _BINS)
    m = np.array([np.median(means[b]) for b in bins])
    v = np.array([np.quantile(variances[b], _VARIANCE_QUANTILE) for b in bins])
    slope, intercept = np.polyfit(m, v, 1)
    fitted = slope * m + intercept
    total = float(np.sum((v - v.mean()) ** 2))
    if slope <= 0 or total == 0:
        return None
    r_squared = 1.0 - float(np.sum((v - fitted) ** 2)) / total
    if r_squared < _MIN_R_SQUARED or slope * (m[-1] - m[0]) < _MIN_VARIANCE_RISE * v[0]:
        return None
    return float(-intercept / slope)


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
        or too high), or, without a dark, the frames sit on a flat pedestal far above zero,
        or (where no pixel is dark, as behind a diffuser) their noise says zero light lies
        far above zero (:func:`estimate_zero_level`): a camera offset that nothing
        subtracts.
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
    elif (f.zero_level is not None and f.zero_level > ZERO_LEVEL_SIGMA * f.sigma
          and f.zero_level <= f.low_1 + PEDESTAL_FLATNESS_SIGMA * f.sigma):
        warnings.warn(
            f"{video}: no [video] dark is given, but zero light sits at about "
            f"{f.zero_level:.4g} counts (where the shot noise, which grows with the light, "
            f"would vanish; {f.zero_level / f.sigma:.0f} times the noise of {f.sigma:.3g}): a "
            "camera offset, which the volumes would explain as haze; set [video] dark to a "
            "dark frame (the mean of frames taken with the light off), or subtract about "
            f"{f.zero_level:.4g} counts from the video", FrameOffsetWarning, stacklevel=2)
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
