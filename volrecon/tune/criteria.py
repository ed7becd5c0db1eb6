"""How a sweep cell is scored and chosen, with and without a reference.

Criteria without ground truth
-----------------------------
1. **Discrepancy principle** (Morozov [1]_): a good reconstruction explains the frame to
   within its noise, ``‖Av − b‖² ≈ E‖n‖²``, the expected noise energy of the camera model
   (:meth:`volrecon.tune.noise.FrameNoise.expected_residual_energy`). The ratio
   ``ρ = ‖Av − b‖² / E‖n‖²`` is reported for every cell. ``ρ`` well above 1 means the
   weights erase signal the data demand. Cells with ``ρ > max(1, ρ_min) + margin`` are
   refused (``ρ_min``, the smallest ratio of the sweep, allows for model error that no
   setting can fit). Morozov's own choice, the most regularised cell still at or below the
   target, is reported beside the final one.
2. **Held-out prediction error** (cross-validation [2]_ across time): the neighbours
   ``b₋, b₊`` of a frame show the same scene, to first order in its motion, with
   independent noise. ``‖Av − (b₋ + b₊)/2‖² − (Σσ²₋ + Σσ²₊)/4`` is an unbiased estimate of
   ``‖Av − s‖²``, the error of the reconstruction's prediction of the noise-free frame ``s``.
   The noise terms come from the camera model; they are the same for every cell, so they
   never change the ranking. This is the same risk that SURE [3]_ and generalised
   cross-validation [4]_ estimate, but it needs neither the solver's divergence (a second,
   perturbed solve per cell for a nonlinear solver) nor a linear estimator. The admissible
   cell with the smallest mean error over the sites is chosen.
3. **Stability across neighbouring settings** (after the quasi-optimality criterion of
   Tikhonov and Glasko [5]_): the mean relative change of the (blurred) reconstruction to
   the neighbouring settings of the grid. A chosen cell whose stability is much worse than
   its neighbours' sits on a steep part of the response and is flagged in the report.

With a reference
----------------
With a registered reference volume of the same sample the score is the mean correlation
after registration (:func:`volrecon.tune.reference.registered_correlation`), and the cell
with the highest score wins; the no-truth choice is still reported.

References
----------
.. [1] V. A. Morozov, "On the solution of functional equations by the method of
   regularization", Soviet Math. Dokl. 7 (1966) 414–417.
.. [2] M. Stone, "Cross-validatory choice and assessment of statistical predictions",
   J. R. Stat. Soc. B 36 (1974) 111–147.
.. [3] C. M. Stein, "Estimation of the mean of a multivariate normal distribution",
   Ann. Statist. 9 (1981) 1135–1151.
.. [4] G. H. Golub, M. Heath, G. Wahba, "Generalized cross-validation as a method for
   choosing a good ridge parameter", Technometrics 21 (1979) 215–223.
.. [5] A. N. Tikhonov, V. B. Glasko, "Use of the regularization method in non-linear
   problems", USSR Comput. Math. Math. Phys. 5 (1965) 93–107.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter

from volrecon.errors import DataError

__all__ = [
    "CRITERIA",
    "Choice",
    "blurred_relative_change",
    "choose_cell",
    "stabilities",
]

#: One line per criterion, with its source (copied into the report).
CRITERIA = {
    "discrepancy": "Morozov's discrepancy principle (Morozov 1966): residual energy over the "
                   "expected noise energy of the camera model (EMVA 1288: Poisson shot noise "
                   "through the photon-transfer gain plus dark-frame variance); cells above "
                   "max(1, smallest ratio) + margin are refused",
    "prediction": "held-out prediction error (cross-validation across time, Stone 1974): "
                  "|Av - (b[t-1] + b[t+1])/2|^2 minus their noise, an unbiased estimate of "
                  "|Av - s|^2 like SURE (Stein 1981) and GCV (Golub, Heath & Wahba 1979); "
                  "the admissible cell with the smallest mean is chosen",
    "stability": "stability across neighbouring settings (after the quasi-optimality "
                 "criterion, Tikhonov & Glasko 1965): mean relative change of the blurred "
                 "volume to the grid neighbours; reported, and a steep spot is flagged",
    "reference": "correlation with the reference volume after registration (both blurred by "
                 "a Gaussian of 1 voxel); the highest mean wins",
    "temporal": "every other frame of a run held out: the even frames solved as one window "
                "at half the weight (exactly the full window without the odd frames' data), "
                "each odd frame predicted by A of its neighbours' midpoint minus its noise; "
                "among weights within the discrepancy limit, the smallest within one "
                "standard error of the lowest error (Breiman et al. 1984)",
}
#: Refuse cells whose discrepancy ratio exceeds max(1, smallest ratio) by more than this.
DISCREPANCY_MARGIN = 0.05


@dataclass(frozen=True)
class Choice:
    """Which cell a rule picked.

    Attributes
    ----------
    index : int
        Position of the chosen cell in the sweep.
    criterion : str
        "prediction" or "reference".
    discrepancy_limit : float
        Largest admissible discrepancy ratio.
    morozov_index : int
        The most regularised cell at or below the discrepancy target (Morozov's own rule).
    prediction_index : int
        The no-truth choice (equal to `index` without a reference).
    """

    index: int
    criterion: str
    discrepancy_limit: float
    morozov_index: int
    prediction_index: int


def choose_cell(discrepancy: Sequence[float], prediction_error: Sequence[float],
                regularisation: Sequence[float], *, reference: Sequence[float] | None = None,
                margin: float = DISCREPANCY_MARGIN) -> Choice:
    """Pick a sweep cell by the criteria of this module.

    Parameters
    ----------
    discrepancy : sequence of float
        Mean discrepancy ratio of each cell.
    prediction_error : sequence of float
        Mean held-out prediction error of each cell.
    regularisation : sequence of float
        Strength of each cell's regularisation (for Morozov's "most regularised"; e.g.
        ``tv_units + l1_units``).
    reference : sequence of float, optional
        Mean reference correlation of each cell.
    margin : float
        See :data:`DISCREPANCY_MARGIN`.

    Returns
    -------
    Choice

    Raises
    ------
    DataError
        If no cell has finite scores (every reconstruction failed).
    """
    rho = np.asarray(discrepancy, dtype=np.float64)
    error = np.asarray(prediction_error, dtype=np.float64)
    strength = np.asarray(regularisation, dtype=np.float64)
    finite = np.isfinite(rho) & np.isfinite(error)
    if not finite.any():
        raise DataError("every reconstruction of the sweep failed (NaN scores); check the "
                        "model and the frames")
    floor = float(rho[finite].min())
    target = max(1.0, floor)
    limit = target + margin
    admissible = finite & (rho <= limit)
    candidates = np.flatnonzero(admissible)
    prediction_index = int(candidates[np.argmin(error[candidates])])
    below = np.flatnonzero(finite & (rho <= target))
    order = np.lexsort((rho[below], strength[below]))  # strongest, then largest ratio
    morozov_index = int(below[order[-1]])
    if reference is not None:
        score = np.asarray(reference, dtype=np.float64)
        valid = np.flatnonzero(np.isfinite(score))
        if valid.size:
            index = int(valid[np.argmax(score[valid])])
            return Choice(index, "reference", limit, morozov_index, prediction_index)
    return Choice(prediction_index, "prediction", limit, morozov_index, prediction_index)


def blurred_relative_change(a_zyx: np.ndarray, b_zyx: np.ndarray, *,
                            blur_voxels: float = 1.0) -> float:
    """``‖G(a − b)‖ / ‖G b‖`` with ``G`` a Gaussian blur of `blur_voxels` (σ, voxels)."""
    ga = gaussian_filter(np.asarray(a_zyx, dtype=np.float64), blur_voxels)
    gb = gaussian_filter(np.asarray(b_zyx, dtype=np.float64), blur_voxels)
    norm = float(np.linalg.norm(gb))
    return float(np.linalg.norm(ga - gb)) / norm if norm > 0 else math.inf


def stabilities(settings: Sequence[tuple[float, float]], volumes: Sequence[np.ndarray]
                ) -> list[float]:
    """Stability of each cell: mean relative change to its nearest grid neighbours.

    The neighbours of a cell are, along each axis, the next smaller and larger computed
    value with the other weight the same.

    Parameters
    ----------
    settings : sequence of (tv, l1)
        The cells.
    volumes : sequence of ndarray of shape (sites, Z, Y, X)
        Their reconstructions.

    Returns
    -------
    list of float
        nan for a cell without neighbours.
    """
    index = {s: i for i, s in enumerate(settings)}
    out = []
    for tv, l1 in settings:
        changes = []
        for axis in (0, 1):
            fixed = l1 if axis == 0 else tv
            line = sorted(s[axis] for s in settings if s[1 - axis] == fixed)
            k = line.index(tv if axis == 0 else l1)
            for j in (k - 1, k + 1):
                if 0 <= j < len(line):
                    other = (line[j], fixed) if axis == 0 else (fixed, line[j])
                    mine, theirs = volumes[index[(tv, l1)]], volumes[index[other]]
                    changes.append(np.mean([blurred_relative_change(m, t)
                                            for m, t in zip(theirs, mine, strict=True)]))
        out.append(float(np.mean(changes)) if changes else math.nan)
    return out
