"""Score a reconstruction against the known truth of a simulated scenario."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.ndimage import gaussian_filter

from volrecon.errors import ShapeError

__all__ = ["Score", "bead_recovery", "blurred_correlation", "score_reconstruction"]


@dataclass(frozen=True)
class Score:
    """Quality of a reconstructed time series against the truth.

    Attributes
    ----------
    correlation : float
        Mean over frames of the Pearson correlation between reconstruction and truth, both
        blurred by a Gaussian of `blur_voxels` (a reconstruction cannot beat the instrument's
        resolution, so voxel-exact comparison understates it).
    beads_found : int
        Beads whose depth profile (maximum over a ±2 px lateral window) peaks within ±1 plane
        of the true depth, above 10 % of the frame's brightest voxel, summed over frames.
    beads_total : int
        Beads × frames scored.
    blur_voxels : float
        Gaussian σ used for the correlation, in voxels.
    """

    correlation: float
    beads_found: int
    beads_total: int
    blur_voxels: float

    @property
    def bead_fraction(self) -> float:
        """Fraction of beads found."""
        return self.beads_found / self.beads_total if self.beads_total else float("nan")


def blurred_correlation(volume_zyx: Any, truth_zyx: Any, *, blur_voxels: float = 1.0) -> float:
    """Pearson correlation of two volumes after the same Gaussian blur (σ in voxels)."""
    a = gaussian_filter(np.asarray(volume_zyx, dtype=np.float64), blur_voxels)
    b = gaussian_filter(np.asarray(truth_zyx, dtype=np.float64), blur_voxels)
    a -= a.mean()
    b -= b.mean()
    denominator = float(np.sqrt((a * a).sum() * (b * b).sum()))
    return float((a * b).sum()) / denominator if denominator > 0 else 0.0


def bead_recovery(volume_zyx: Any, positions_nzyx: Any, *, depth_tolerance: int = 1,
                  lateral_window_px: int = 2, threshold: float = 0.1) -> int:
    """Number of beads found at their depth (see :class:`Score`)."""
    volume = np.asarray(volume_zyx)
    peak = float(volume.max())
    found = 0
    for z, y, x in np.asarray(positions_nzyx):
        yi, xi = int(np.rint(y)), int(np.rint(x))
        window = volume[:, max(yi - lateral_window_px, 0): yi + lateral_window_px + 1,
                        max(xi - lateral_window_px, 0): xi + lateral_window_px + 1]
        if window.size == 0:
            continue
        profile = window.max(axis=(1, 2))
        best = int(profile.argmax())
        if abs(best - z) <= depth_tolerance + 0.5 and profile[best] >= threshold * peak > 0:
            found += 1
    return found


def score_reconstruction(volumes_tzyx: Any, truth_tzyx: Any, positions_tnzyx: Any, *,
                         blur_voxels: float = 1.0) -> Score:
    """Score every frame of a reconstruction against the truth of the scenario."""
    volumes = np.asarray(volumes_tzyx)
    truth = np.asarray(truth_tzyx)
    positions = np.asarray(positions_tnzyx)
    if volumes.shape != truth.shape or volumes.ndim != 4:
        raise ShapeError(f"reconstruction {volumes.shape} and truth {truth.shape} must both be "
                         "(T, Z, Y, X) of the same shape")
    correlations = [blurred_correlation(v, t, blur_voxels=blur_voxels)
                    for v, t in zip(volumes, truth, strict=True)]
    found = sum(bead_recovery(v, p) for v, p in zip(volumes, positions, strict=True))
    return Score(float(np.mean(correlations)), found, positions.shape[0] * positions.shape[1],
                 blur_voxels)
