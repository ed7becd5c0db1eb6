"""The noise a corrected frame carries, estimated from dark frames and the video itself.

Camera model (EMVA 1288 [1]_, linear sensor): a raw pixel with ``e`` photo-electrons reads
``y = offset + K (e + n_r)``, ``e ~ Poisson(μ_e)``, ``n_r ~ N(0, σ_r²)``, so with the dark
mean subtracted, ``s = E[y] − E[y_dark] = K μ_e`` and

    Var[y] = σ_d² + K · s

where ``σ_d²`` (read noise, dark-current shot noise and quantisation, ``K² (μ_d + σ_r²) +
1/12``) is the variance of a dark frame. ``K`` (counts per electron) is the slope of the
*photon-transfer* line, variance against mean [1]_ §6 (the photon-transfer method of
Janesick [2]_).

Here ``σ_d²`` comes per pixel from the dark stack (sample variance across its frames) and
``K`` from the video: for three consecutive frames ``f₀, f₁, f₂`` the second difference
``d = f₁ − (f₀ + f₂)/2`` removes the scene and any change of it that is linear in time
(the sample drifts between frames), keeps ``Var[d] = 1.5 Var[f]``, and cancels the dark
frame exactly. Pixels are grouped by their mean ``m = (f₀ + f₁ + f₂)/3`` into quantile
bins and clipped at 5 σ of ``d`` within each bin (this removes pixels where the scene
changed faster than linearly and biases a Gaussian variance by 1.5e-5, negligible). Then
``K = Σ (d²/1.5 − σ_d²) / Σ m`` over the kept pixels: each term is unbiased pixel by
pixel, whereas a fit against the noisy ``m`` would be attenuated towards zero (regression
dilution) at low light. Without dark frames slope and intercept come from least squares of
``d²/1.5`` on ``m`` with the errors-in-variables (reliability ratio) correction of the
slope [3]_, which is only trustworthy when the scene's spread dominates the noise of ``m``
(a warning says otherwise).

Corrections change the units: dividing by a flat field ``g`` and averaging ``b × b`` blocks
gives ``Var = (1/b⁴) Σ σ_d²/g² + K · q · s`` with ``q = mean(1/g)/b²`` over each block, which
:class:`FrameNoise` carries as per-pixel maps on the corrected grid.

References
----------
.. [1] EMVA Standard 1288, Standard for Characterization of Image Sensors and Cameras,
   release 3.1, European Machine Vision Association (2016).
.. [2] J. R. Janesick, Photon Transfer: DN → λ, SPIE Press (2007).
.. [3] W. A. Fuller, Measurement Error Models, Wiley (1987), §1.1.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from volrecon.errors import DataError, ShapeError, VolreconWarning

if TYPE_CHECKING:
    from collections.abc import Sequence

    from volrecon.io.correct import FrameCorrection

__all__ = ["FrameNoise", "PhotonTransfer", "dark_statistics", "estimate_frame_noise"]

#: Quantile bins of the photon-transfer curve.
TRANSFER_BINS = 16
#: Clipping threshold (in standard deviations) of the per-bin variance.
CLIP_SIGMAS = 5.0
#: Var[f₁ − (f₀ + f₂)/2] / Var[f] for equal variances.
SECOND_DIFFERENCE_GAIN = 1.5
#: Without dark frames: warn when noise makes up more than this share of the spread of the
#: pixel means (the errors-in-variables correction of the slope then exceeds 10 %).
MIN_RELIABILITY = 0.9


@dataclass(frozen=True)
class PhotonTransfer:
    """The measured photon-transfer curve of the video (for the report).

    Attributes
    ----------
    mean : ndarray of shape (B,)
        Mean corrected signal of each bin, times the pixels' slope factor ``q``.
    variance : ndarray of shape (B,)
        Variance of a single frame in each bin (from second differences).
    intercept : ndarray of shape (B,)
        Mean zero-signal variance of the bin's pixels (from the dark frames, or the fitted
        intercept).
    pixels : ndarray of shape (B,)
        Samples per bin after clipping.
    """

    mean: np.ndarray
    variance: np.ndarray
    intercept: np.ndarray
    pixels: np.ndarray


@dataclass(frozen=True, eq=False)
class FrameNoise:
    """Per-pixel noise variance of corrected frames: ``σ²(p) = c(p) + K · q(p) · max(f(p), 0)``.

    Attributes
    ----------
    gain_adu_per_electron : float
        ``K``, raw camera counts per photo-electron (photon-transfer slope).
    gain_stderr : float
        Standard error of `gain_adu_per_electron` from the fit (``nan`` when given).
    intercept_yx : ndarray of shape (Y, X), float32
        ``c``: variance of a corrected frame at zero signal.
    slope_yx : ndarray of shape (Y, X), float32
        ``q``: how the raw gain scales on the corrected grid (1 without flat or binning).
    dark_mean_variance_yx : ndarray of shape (Y, X), float32
        Variance of the subtracted dark mean (``c / N_dark``; zeros without a dark stack).
        The same in every frame: it adds to the residual of one frame but not to the
        difference of two.
    dark_frames : int
        Frames in the dark stack (0: none; the intercept was fitted).
    transfer : PhotonTransfer
        The measured curve (empty when the gain was given).
    """

    gain_adu_per_electron: float
    gain_stderr: float
    intercept_yx: np.ndarray = field(repr=False)
    slope_yx: np.ndarray = field(repr=False)
    dark_mean_variance_yx: np.ndarray = field(repr=False)
    dark_frames: int
    transfer: PhotonTransfer = field(repr=False)

    def variance(self, frame_yx: np.ndarray) -> np.ndarray:
        """Per-pixel variance of one corrected frame ``(Y, X)``, float64 (without the dark mean)."""
        frame = np.asarray(frame_yx, dtype=np.float64)
        return np.maximum(self.intercept_yx + self.gain_adu_per_electron * self.slope_yx
                          * np.maximum(frame, 0.0), 0.0)

    def expected_residual_energy(self, frame_yx: np.ndarray) -> float:
        """``E‖n‖²`` of one corrected frame: the discrepancy target of Morozov's principle.

        Uses the frame itself as the estimate of its mean signal, which is unbiased for the
        sum over pixels (``Σ K q f`` rather than ``Σ K q max(f, 0)``); includes the error of
        the subtracted dark mean. Never below the zero-signal part.
        """
        frame = np.asarray(frame_yx, dtype=np.float64)
        base = float(self.intercept_yx.sum(dtype=np.float64)
                     + self.dark_mean_variance_yx.sum(dtype=np.float64))
        shot = self.gain_adu_per_electron * float((self.slope_yx * frame).sum(dtype=np.float64))
        return max(base + shot, base)


def dark_statistics(path: str, *, frames_per_read: int = 64) -> tuple[np.ndarray, np.ndarray, int]:
    """Per-pixel mean and sample variance (ddof 1) of a stack of dark frames.

    Parameters
    ----------
    path : str
        Multi-page TIFF of dark exposures ``(N, Y, X)``.
    frames_per_read : int
        Frames read at a time (memory bound).

    Returns
    -------
    mean_yx, variance_yx : ndarray of shape (Y, X), float64
        The variance is ``nan`` everywhere when ``N == 1``.
    n_frames : int

    Raises
    ------
    InputFileError
        If the file is missing or not a TIFF of 2-D frames.
    """
    from volrecon.io.frames import TiffFrames

    source = TiffFrames.open(path)
    n = source.n_frames
    total = np.zeros(source.shape[1:], dtype=np.float64)
    squares = np.zeros(source.shape[1:], dtype=np.float64)
    # Shifted sums (shift = first frame) keep the variance exact for large offsets.
    shift = source.read(0, 1)[0].astype(np.float64)
    for start in range(0, n, frames_per_read):
        block = source.read(start, min(start + frames_per_read, n)).astype(np.float64) - shift
        total += block.sum(axis=0)
        squares += (block * block).sum(axis=0)
    mean = total / n
    variance = ((squares - n * mean * mean) / (n - 1) if n > 1
                else np.full(source.shape[1:], np.nan))
    return mean + shift, np.maximum(variance, 0.0), n


def _corrected_maps(raw_variance_yx: np.ndarray | None, correction: FrameCorrection,
                    shape_yx: tuple[int, int]) -> tuple[np.ndarray | None, np.ndarray]:
    """Zero-signal variance and slope factor of corrected pixels (see the module notes)."""
    b = correction.binning
    inverse_gain = (np.ones(shape_yx) if correction.gain_yx is None
                    else 1.0 / correction.gain_yx.astype(np.float64))

    def block_mean(a: np.ndarray) -> np.ndarray:
        if b == 1:
            return a
        ny, nx = a.shape
        out: np.ndarray = a.reshape(ny // b, b, nx // b, b).mean(axis=(1, 3))
        return out

    slope = block_mean(inverse_gain) / (b * b)
    intercept = None
    if raw_variance_yx is not None:
        intercept = block_mean(raw_variance_yx * inverse_gain**2) / (b * b)
    return intercept, slope


def _clip_by_bins(x: np.ndarray, d: np.ndarray, c: np.ndarray
                  ) -> tuple[np.ndarray, PhotonTransfer]:
    """Clip each quantile bin of `x` at CLIP_SIGMAS; return the kept mask and the curve."""
    edges = np.unique(np.quantile(x, np.linspace(0.0, 1.0, TRANSFER_BINS + 1)))
    index = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, max(len(edges) - 2, 0))
    keep = np.zeros(x.size, dtype=bool)
    rows = []
    for k in range(max(len(edges) - 1, 1)):
        members = np.flatnonzero(index == k)
        values = d[members]
        kept = np.ones(values.size, dtype=bool)
        for _ in range(5):
            sigma = math.sqrt(float(np.mean(values[kept] ** 2))) if kept.any() else 0.0
            new = np.abs(values) <= CLIP_SIGMAS * sigma if sigma > 0 else kept
            if np.array_equal(new, kept):
                break
            kept = new
        keep[members[kept]] = True
        if kept.sum() >= 2:
            rows.append((float(x[members][kept].mean()),
                         float(np.mean(values[kept] ** 2)) / SECOND_DIFFERENCE_GAIN,
                         float(c[members][kept].mean()), int(kept.sum())))
    table = np.array(rows, dtype=np.float64).reshape(-1, 4)
    return keep, PhotonTransfer(mean=table[:, 0], variance=table[:, 1], intercept=table[:, 2],
                                pixels=table[:, 3].astype(np.int64))


def estimate_frame_noise(triples: Sequence[np.ndarray], correction: FrameCorrection, *,
                         dark_variance_yx: np.ndarray | None = None, dark_frames: int = 0,
                         gain_adu_per_electron: float | None = None,
                         where: str = "video") -> FrameNoise:
    """Estimate the noise of corrected frames by photon transfer (see the module notes).

    Parameters
    ----------
    triples : sequence of ndarray of shape (3, Y', X'), float
        Runs of three consecutive *corrected* frames (on the model grid).
    correction : FrameCorrection
        The correction that produced them (flat field and binning change the units).
    dark_variance_yx : ndarray of shape (Y, X), optional
        Per-pixel variance of raw dark frames (:func:`dark_statistics`). Without it the
        zero-signal variance is fitted as one number.
    dark_frames : int
        Frames averaged into the subtracted dark mean (0: no dark was subtracted).
    gain_adu_per_electron : float, optional
        The camera's gain, when known; skips its estimate.
    where : str
        Name of the video for messages.

    Returns
    -------
    FrameNoise

    Raises
    ------
    ShapeError
        If no triple is given or a triple is not ``(3, Y', X')``.
    DataError
        If the frames show no shot noise (a non-positive slope: too dim, saturated, or the
        same frame repeated), or the dark variance is not finite.
    """
    if not triples:
        raise ShapeError(f"{where}: the noise estimate needs runs of 3 consecutive frames; "
                         "use a video with at least 3 frames")
    stack = [np.asarray(t, dtype=np.float64) for t in triples]
    shape = stack[0].shape
    if len(shape) != 3 or shape[0] != 3 or any(t.shape != shape for t in stack):
        raise ShapeError(f"{where}: frame runs must all have shape (3, Y, X); got "
                         f"{[t.shape for t in stack]}")
    ny, nx = shape[1:]
    b = correction.binning
    if dark_variance_yx is not None:
        if not np.all(np.isfinite(dark_variance_yx)):
            raise DataError(f"{where}: the dark-frame variance is not finite; record at least "
                            "2 dark frames")
        if dark_variance_yx.shape != (ny * b, nx * b):
            raise ShapeError(f"{where}: dark frames of shape {dark_variance_yx.shape} do not "
                             f"match the raw frames {(ny * b, nx * b)}")
    intercept_map, slope_map = _corrected_maps(dark_variance_yx, correction, (ny * b, nx * b))

    means = np.concatenate([t.mean(axis=0).ravel() for t in stack])
    second = np.concatenate([(t[1] - 0.5 * (t[0] + t[2])).ravel() for t in stack])
    q = np.tile(slope_map.ravel(), len(stack))
    x_all = q * means
    known = intercept_map is not None
    c_all = (np.tile(intercept_map.ravel(), len(stack)) if intercept_map is not None
             else np.zeros_like(x_all))
    keep, transfer = _clip_by_bins(x_all, second, c_all)
    x, y, c = x_all[keep], second[keep] ** 2 / SECOND_DIFFERENCE_GAIN, c_all[keep]
    if gain_adu_per_electron is not None:
        gain, stderr = float(gain_adu_per_electron), math.nan
        offset = float(np.mean(y - gain * x)) if not known else 0.0
    elif known:
        # Ratio of sums: E[y − c] = K x pixel by pixel, so Σ(y − c) / Σx is unbiased even
        # though x is noisy (a fit against noisy x would be attenuated).
        total = float(x.sum())
        gain = float((y - c).sum()) / total if total > 0 else math.nan
        stderr = float(np.std(y - c - gain * x)) * math.sqrt(x.size) / total if total > 0 \
            else math.nan
        offset = 0.0
    else:
        # Least squares of y on x, corrected for the noise in x (reliability ratio): the
        # noise variance of a 3-frame mean is Var[f]/3, estimated by mean(y)/3.
        spread = float(np.var(x)) - float(np.mean(y)) / 3.0 * float(np.mean(q * q))
        if x.size < 16 or spread <= 1e-12 * max(float(np.var(x)), 1e-300):
            raise DataError(f"{where}: the frames span too small a range of brightness to "
                            "fit the photon-transfer line; give a dark stack ([video] dark)")
        # Poisson skew: the mean and the squared second difference of the same frames
        # co-vary through the third cumulant, κ₃ = K² q x per pixel, which adds
        # K² mean(q x) / 3 to Cov(x, y) (a 2-10 % upward bias at typical spreads); solve
        # Cov = K spread + K² skew for K.
        covariance = float(np.mean((x - x.mean()) * (y - y.mean())))
        skew = float(np.mean(q[keep] * x)) / 3.0
        root = math.sqrt(max(spread * spread + 4.0 * skew * covariance, 0.0))
        gain = 2.0 * covariance / (spread + root)
        reliability = spread / float(np.var(x))
        if reliability < MIN_RELIABILITY:
            warnings.warn(
                f"{where}: without dark frames the photon-transfer fit is uncertain at this "
                f"light level (pixel-to-pixel signal spread only {reliability:.0%} of the "
                "observed spread); give a dark stack ([video] dark) or the camera gain",
                VolreconWarning, stacklevel=2)
        offset = float(np.mean(y) - gain * np.mean(x))
        stderr = float(np.std(y - offset - gain * x)) / math.sqrt(x.size * spread)
    if not (math.isfinite(gain) and gain > 0):
        raise DataError(
            f"{where}: the frames show no photon shot noise (photon-transfer slope "
            f"{gain:.3g}); the video may be saturated, empty or repeated frames; give the "
            "camera gain instead"
        )
    intercept = intercept_map if intercept_map is not None else np.full((ny, nx),
                                                                        max(offset, 0.0))
    if not known:
        transfer = dataclasses.replace(transfer, intercept=np.full(transfer.mean.shape, offset))
    # The subtracted dark mean of N frames carries 1/N of a dark frame's variance.
    dark_mean = intercept / dark_frames if dark_frames > 0 else np.zeros((ny, nx))
    return FrameNoise(
        gain_adu_per_electron=gain, gain_stderr=stderr,
        intercept_yx=np.asarray(intercept, dtype=np.float32),
        slope_yx=slope_map.astype(np.float32),
        dark_mean_variance_yx=np.asarray(dark_mean, dtype=np.float32),
        dark_frames=int(dark_frames),
        transfer=transfer)
