"""Cleaning a raw bead scan: crop, offset and background, hot pixels, clip, bin, normalise."""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.ndimage

from volrecon.errors import ConfigError, DataError, ShapeError

__all__ = [
    "NORMALIZATIONS",
    "CleanedStack",
    "bin_pixels",
    "border_background",
    "clean_psf_stack",
    "crop_pixels",
    "mask_background",
    "suppress_hot_pixels",
]

#: Factor from the median absolute deviation to the standard deviation of Gaussian noise.
_MAD_TO_SIGMA = 1.4826

#: Footprint of the 8 neighbours of a pixel.
_RING = np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]], dtype=bool)

#: How the planes are scaled: "stack" keeps the relative throughput (brightest plane sums
#: to 1, every other plane to its measured throughput), "planes" scales every plane to unit
#: sum (the throughput only in the metadata), "none" keeps camera counts.
NORMALIZATIONS = ("stack", "planes", "none")


@dataclass(frozen=True)
class CleanedStack:
    """A cleaned PSF stack and what cleaning found.

    Attributes
    ----------
    psf_zyx : ndarray of shape (Z, Y, X), float32
        Cleaned planes: plane ``z`` sums to ``throughput[z]`` (normalisation "stack"), to 1
        ("planes") or keeps camera counts ("none").
    plane_sums : ndarray of shape (Z,), float64
        Light in each plane after offset subtraction, hot-pixel suppression and the
        background mask, before clipping (camera counts): an unbiased measure of throughput.
    throughput : ndarray of shape (Z,), float64
        ``plane_sums / plane_sums.max()``: relative light collected from each depth.
    background : ndarray of shape (Z,), float64
        Offset subtracted from each plane, counts per raw pixel (after any dark frame).
    noise_sigma : ndarray of shape (Z,), float64
        Robust noise estimate of each plane before binning, counts per raw pixel.
    hot_pixels : int
        Number of (plane, pixel) values replaced by the median of their neighbours.
    support_fraction : float
        Fraction of (plane, pixel) values kept by the background mask (1 without it).
    normalization : {"stack", "planes", "none"}
        How the planes were scaled (see :data:`NORMALIZATIONS`).
    """

    psf_zyx: np.ndarray
    plane_sums: np.ndarray
    throughput: np.ndarray
    background: np.ndarray
    noise_sigma: np.ndarray
    hot_pixels: int
    support_fraction: float
    normalization: str

    @property
    def normalized(self) -> bool:
        """Whether the planes were scaled at all (normalisation other than "none")."""
        return self.normalization != "none"


def crop_pixels(stack: np.ndarray, crop_yx: tuple[int, int, int, int] | None) -> np.ndarray:
    """The window ``[y0:y1, x0:x1]`` of the last two axes (a view); None: unchanged.

    Raises
    ------
    ConfigError
        If the window is empty or reaches outside the image.
    """
    if crop_yx is None:
        return stack
    y0, y1, x0, x1 = (int(c) for c in crop_yx)
    ny, nx = stack.shape[-2:]
    if not (0 <= y0 < y1 <= ny and 0 <= x0 < x1 <= nx):
        raise ConfigError(f"--crop {y0}:{y1},{x0}:{x1} does not fit inside the {ny} x {nx} "
                          f"image; use 0 <= Y0 < Y1 <= {ny} and 0 <= X0 < X1 <= {nx}")
    return stack[..., y0:y1, x0:x1]


def bin_pixels(stack: Any, factor: int) -> np.ndarray:
    """Sum ``factor × factor`` pixel blocks of the last two axes (counts are kept).

    Rows and columns that do not fill a whole block (at the bottom and right) are dropped.

    Raises
    ------
    ConfigError
        If `factor` is not a positive integer or is larger than the image.
    """
    a = np.asarray(stack)
    if not (isinstance(factor, int | np.integer) and factor >= 1):
        raise ConfigError(f"--bin must be a positive integer; got {factor!r}")
    if factor == 1:
        return a
    ny, nx = a.shape[-2:]
    if factor > min(ny, nx):
        raise ConfigError(f"--bin {factor} is larger than the {ny} x {nx} image; use a factor "
                          f"up to {min(ny, nx)}")
    by, bx = ny // factor, nx // factor
    trimmed = a[..., : by * factor, : bx * factor]
    return np.asarray(trimmed.reshape(*a.shape[:-2], by, factor, bx, factor).sum(axis=(-3, -1)))


def border_background(stack_zyx: np.ndarray, *, width: int | None = None
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Per-plane offset and noise from a border band: clipped mean and 1.4826·MAD.

    Parameters
    ----------
    stack_zyx : ndarray of shape (Z, Y, X)
    width : int, optional
        Band width in pixels; default ``max(2, min(Y, X) // 16)``.

    Returns
    -------
    background, sigma : ndarray of shape (Z,), float64

    Notes
    -----
    The offset is the mean of the band values within 3σ of their median, so up to half the
    band may be PSF light; a PSF that covers most of the border (large caustics) biases the
    offset upwards: pass a dark frame then.
    """
    ny, nx = stack_zyx.shape[-2:]
    w = max(2, min(ny, nx) // 16) if width is None else int(width)
    w = max(1, min(w, ny // 2, nx // 2))
    mask = np.ones((ny, nx), dtype=bool)
    mask[w : ny - w, w : nx - w] = False
    band = stack_zyx[:, mask].astype(np.float64)
    median = np.median(band, axis=1)
    sigma = _MAD_TO_SIGMA * np.median(np.abs(band - median[:, None]), axis=1)
    # Mean of the values within 3 sigma of the median: robust to PSF light in the band like
    # the median, but free of the median's rounding to whole counts on integer data.
    inside = np.abs(band - median[:, None]) <= 3.0 * np.maximum(sigma, 1e-30)[:, None]
    background = np.where(inside, band, 0.0).sum(axis=1) / np.maximum(inside.sum(axis=1), 1)
    return background, sigma


def suppress_hot_pixels(stack_zyx: np.ndarray, *, sigma: float = 6.0,
                        isolation: float = 0.2) -> tuple[np.ndarray, int]:
    """Replace isolated single-pixel spikes by the median of their 8 neighbours.

    A value is a spike when it exceeds the median of its neighbours by more than `sigma`
    times the plane's robust noise (1.4826·MAD of pixel minus neighbour median) *and* its
    brightest neighbour is below ``isolation`` times its own value. An optical PSF is
    band-limited, so a well-sampled PSF (Gaussian σ above about 0.56 px for the default
    0.2) never has a pixel that outshines all neighbours five-fold; hot pixels and
    cosmic-ray hits do.

    Parameters
    ----------
    stack_zyx : ndarray of shape (Z, Y, X)
        Offset-subtracted planes (background near 0).
    sigma : float
        Detection threshold in noise standard deviations (> 0).
    isolation : float
        Largest allowed ratio of the brightest neighbour to the spike, in (0, 1).

    Returns
    -------
    cleaned : ndarray of shape (Z, Y, X), float32
    count : int
        Number of values replaced.

    Raises
    ------
    ConfigError
        If `sigma` or `isolation` is out of range.
    """
    if not sigma > 0:
        raise ConfigError(f"hot_pixel_sigma must be positive; got {sigma!r}")
    if not 0 < isolation < 1:
        raise ConfigError(f"hot_pixel_isolation must be in (0, 1); got {isolation!r}")
    out = np.array(stack_zyx, dtype=np.float32)
    count = 0
    for z in range(out.shape[0]):
        plane = out[z]
        median = scipy.ndimage.median_filter(plane, footprint=_RING, mode="mirror")
        brightest = scipy.ndimage.maximum_filter(plane, footprint=_RING, mode="mirror")
        residual = plane - median
        noise = _MAD_TO_SIGMA * float(np.median(np.abs(residual - np.median(residual))))
        noise = max(noise, float(np.finfo(np.float32).eps) * max(float(np.abs(plane).max()), 1))
        spikes = (residual > sigma * noise) & (brightest < isolation * plane)
        count += int(spikes.sum())
        plane[spikes] = median[spikes]
    return out, count


def mask_background(stack_zyx: np.ndarray, *, sigma: float = 3.0, smoothing_px: float = 2.0
                    ) -> tuple[np.ndarray, float]:
    """Zero the pixels of each plane that are not near detectable PSF light.

    Each offset-subtracted plane is smoothed with a Gaussian of `smoothing_px`; pixels where
    the smoothed plane exceeds `sigma` times its noise, grown by ``ceil(smoothing_px)``
    pixels, are kept; the rest are set to 0. The noise is the root mean square of the
    smoothed plane's negative values (light only adds, so these are noise alone), which
    needs no light-free border; a plane with light everywhere keeps every lit pixel. Clipping pure
    noise at zero would otherwise leave a positive pedestal of about 0.4 σ per pixel over
    the whole field (the mean of a half-normal), which for a large field can hold as much
    light as the PSF itself.

    Parameters
    ----------
    stack_zyx : ndarray of shape (Z, Y, X)
        Offset-subtracted planes.
    sigma : float
        Detection threshold in noise standard deviations of the smoothed plane (> 0).
    smoothing_px : float
        Gaussian standard deviation of the smoothing, pixels (> 0).

    Returns
    -------
    masked : ndarray of shape (Z, Y, X), float32
    kept : float
        Fraction of the pixels kept, over all planes.

    Raises
    ------
    ConfigError
        If `sigma` or `smoothing_px` is not positive.
    """
    if not sigma > 0:
        raise ConfigError(f"support_sigma must be positive (or None to keep every pixel); got "
                          f"{sigma!r}")
    if not smoothing_px > 0:
        raise ConfigError(f"smoothing_px must be positive; got {smoothing_px!r}")
    out = np.array(stack_zyx, dtype=np.float32)
    grow = int(np.ceil(smoothing_px))
    kept = 0
    for z in range(out.shape[0]):
        smoothed = scipy.ndimage.gaussian_filter(out[z], smoothing_px, mode="nearest")
        negative = smoothed[smoothed < 0].astype(np.float64)
        # Light only adds, so the negative values are noise alone: for zero-mean noise
        # E[s² | s < 0] = σ². Too few of them (light everywhere): keep every lit pixel.
        noise = float(np.sqrt(np.mean(negative**2))) if negative.size >= 16 else 0.0
        support = smoothed > sigma * noise
        if support.any():
            support = scipy.ndimage.binary_dilation(support, iterations=grow)
        out[z][~support] = 0.0
        kept += int(support.sum())
    return out, kept / out.size


def clean_psf_stack(stack_zyx: Any, *, dark_yx: Any = None, crop_yx: tuple[int, int, int, int]
                    | None = None, bin_factor: int = 1, hot_pixel_sigma: float | None = 6.0,
                    support_sigma: float | None = 3.0, normalization: str = "stack",
                    normalize: bool | None = None) -> CleanedStack:
    """Turn a raw bead scan into clean, non-negative PSF planes.

    Steps, in order: crop; subtract the dark frame if given, else each plane's border
    median (:func:`border_background`); suppress hot pixels (:func:`suppress_hot_pixels`);
    zero the pixels far from any detectable light (:func:`mask_background`); clip at zero;
    bin (:func:`bin_pixels`); scale the planes as `normalization` says.

    Parameters
    ----------
    stack_zyx : ndarray of shape (Z, Y, X)
        Raw planes, any real dtype; plane ``i`` is depth ``i`` of the scan. Not modified.
    dark_yx : ndarray of shape (Y, X) or (N, Y, X), optional
        Camera offset frame(s) on the raw grid (before cropping); several frames are
        averaged.
    crop_yx : tuple of int, optional
        ``(y0, y1, x0, x1)`` window of the raw image to keep.
    bin_factor : int
        Lateral binning (sum of ``bin_factor²`` pixels), e.g. to match the video's binning.
    hot_pixel_sigma : float or None
        Spike threshold in noise standard deviations; None skips hot-pixel suppression.
    support_sigma : float or None
        Detection threshold of :func:`mask_background`; None keeps every pixel (noise
        clipped at zero then adds a positive pedestal).
    normalization : {"stack", "planes", "none"}
        "stack" (default): plane ``z`` is scaled to sum to its measured relative throughput
        (its light before clipping over that of the brightest plane), so the brightest
        plane sums to 1 and the model keeps how much light each depth delivers. "planes":
        every plane sums to 1 (the throughput is then only reported). "none": camera counts.
    normalize : bool, optional
        Deprecated: True is ``normalization="planes"``, False ``normalization="none"``.

    Returns
    -------
    CleanedStack

    Raises
    ------
    ShapeError
        If the stack is not 3-D or the dark frame's shape does not match it.
    DataError
        If the stack or dark holds NaN/Inf, a raw plane is all zero, or a plane has no
        light left above the background.
    ConfigError
        If the crop, binning, threshold or normalisation is invalid.

    Notes
    -----
    With "stack", plane ``z`` is ``b_z · t_z / Σ b_z`` for the binned, clipped plane ``b_z``
    and the throughput ``t_z = s_z / max_k s_k`` of the sums ``s_z`` before clipping: the
    shape comes from the clipped plane, the scale from the unbiased sum.
    """
    normalization = normalization_option(normalization, normalize)
    raw = np.asarray(stack_zyx)
    if raw.ndim != 3:
        raise ShapeError(f"the PSF stack must have 3 axes (Z, Y, X); got shape {raw.shape}")
    _check_finite(raw, "the PSF stack")
    flat = raw.reshape(raw.shape[0], -1)
    zero = np.flatnonzero(~flat.any(axis=1))
    if zero.size:
        raise DataError(f"plane {int(zero[0])} of the PSF stack is all zero; remove empty "
                        "planes (or fix the acquisition) before calibrating")
    cropped = crop_pixels(raw, crop_yx).astype(np.float32)
    z = cropped.shape[0]
    if dark_yx is not None:
        dark = np.asarray(dark_yx)
        if dark.ndim == 3:
            dark = dark.mean(axis=0, dtype=np.float64)
        if dark.shape != raw.shape[-2:]:
            raise ShapeError(f"the dark frame has shape {dark.shape} but the PSF planes are "
                             f"{raw.shape[-2:]}; record the dark with the same camera ROI and "
                             "binning as the bead scan")
        _check_finite(dark, "the dark frame")
        cropped -= crop_pixels(dark, crop_yx).astype(np.float32)
        background = np.zeros(z)
        _, noise = border_background(cropped)
    else:
        background, noise = border_background(cropped)
        cropped -= background[:, None, None].astype(np.float32)
    hot = 0
    if hot_pixel_sigma is not None:
        cropped, hot = suppress_hot_pixels(cropped, sigma=hot_pixel_sigma)
    kept = 1.0
    if support_sigma is not None:
        cropped, kept = mask_background(cropped, sigma=support_sigma)
    # Light per plane before clipping: clipping noise at zero biases sums upwards by about
    # 0.4 sigma per noise-dominated pixel, so throughput is measured first.
    sums = cropped.reshape(z, -1).sum(axis=1, dtype=np.float64)
    np.clip(cropped, 0.0, None, out=cropped)
    binned = np.asarray(bin_pixels(cropped, bin_factor), dtype=np.float32)
    clipped_sums = binned.reshape(z, -1).sum(axis=1, dtype=np.float64)
    empty = np.flatnonzero((sums <= 0) | (clipped_sums <= 0))
    if empty.size:
        raise DataError(f"plane {int(empty[0])} of the PSF stack has no light above the "
                        "background; check the dark frame or remove the plane")
    throughput = sums / sums.max()
    if normalization != "none":
        target = throughput if normalization == "stack" else np.ones(z)
        binned = (binned * (target / clipped_sums)[:, None, None]).astype(np.float32)
    return CleanedStack(psf_zyx=binned, plane_sums=sums, throughput=throughput,
                        background=background, noise_sigma=noise, hot_pixels=hot,
                        support_fraction=kept, normalization=normalization)


def normalization_option(normalization: str, normalize: bool | None = None) -> str:
    """Check `normalization`; map the deprecated `normalize` (with a FutureWarning).

    Raises
    ------
    ConfigError
        If `normalization` is not one of :data:`NORMALIZATIONS`.
    """
    if normalize is not None:
        new = "planes" if normalize else "none"
        warnings.warn(f"normalize={normalize} is deprecated; use normalization={new!r} "
                      "(the default, 'stack', keeps each plane's relative throughput)",
                      FutureWarning, stacklevel=3)
        return new
    if normalization not in NORMALIZATIONS:
        raise ConfigError(f"normalization must be one of {', '.join(NORMALIZATIONS)}; got "
                          f"{normalization!r}")
    return normalization


def _check_finite(a: np.ndarray, name: str) -> None:
    if np.issubdtype(a.dtype, np.floating) and not np.isfinite(a).all():
        bad = np.argwhere(~np.isfinite(a))[0].tolist()
        raise DataError(f"{name} contains NaN or Inf (first at index {bad}); replace bad "
                        "values before calibrating")
