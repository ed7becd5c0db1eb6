"""The tv × l1 sweep: a log grid in units of the back-projected noise, coarse then fine.

Unit of the weights
-------------------
The weights enter the objective ``½‖Av − b‖² + l1·Σv + tv·TV(v)`` in the units of the frame
and the model, so a good value depends on the brightness, the noise and the PSF. The sweep
is laid out in multiples of

    u = σ̄ · median_z ‖h_z‖₂,

the standard deviation of one voxel of ``Aᵀn`` for white noise ``n`` of the frames' mean
variance ``σ̄²`` (``h_z`` is plane ``z`` of the PSF as the model sees it, read off
``Aᵀ`` of a point at the sensor centre). At the optimum of the l1 problem a voxel is zero
unless ``Aᵀ(b − Av)`` there exceeds ``l1``, so ``l1 = k·u`` suppresses voxels explained by
noise at about ``k`` standard deviations; TV acts on differences of neighbouring voxels
and lives on the same scale.

Coarse to fine
--------------
The coarse grid is ``{0, 0.1, 1} u`` for tv and ``{0, 1, 10} u`` for l1 (zero included, so
"no regularisation" always competes; 0.1 u reaches below 1e-3 of a typical frame level).
The fine stage adds the half-decade neighbours (factor √10) of the best coarse cell,
extending the grid outwards when the best cell lies on its edge, so the final step between
settings is a factor of about 3. When the best cell still lies on the upper edge of a weight
after the fine stage, :func:`volrecon.tune.tune_job` warns (one line naming the weight) and
widens once more; a second warning says when even that did not reach past the best.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel
    from volrecon.tune.noise import FrameNoise
    from volrecon.tune.sites import Site

__all__ = [
    "COARSE_L1_UNITS",
    "COARSE_TV_UNITS",
    "SweepCell",
    "fine_grid",
    "weight_unit",
]

COARSE_TV_UNITS = (0.0, 0.1, 1.0)
COARSE_L1_UNITS = (0.0, 1.0, 10.0)
#: Ratio between neighbouring settings of the fine stage.
FINE_STEP = math.sqrt(10.0)


@dataclass(frozen=True, eq=False)
class SweepCell:
    """One setting of the sweep and what it gave on every site.

    Attributes
    ----------
    tv_units, l1_units : float
        Weights in units of :func:`weight_unit`.
    tv, l1 : float
        The weights themselves (what the job file gets).
    stage : int
        0 for the coarse grid, 1 for the fine stage.
    discrepancy : tuple of float
        Per site, ``‖Av − b‖² / E‖n‖²`` (Morozov's ratio; 1 = the residual is the noise).
    prediction_error : tuple of float
        Per site, the estimated ``‖Av − s‖² / N`` (per pixel) from the held-out neighbours.
    reference : tuple of float or None
        Per site, correlation with the reference volume after registration.
    stability : float
        Mean relative change (blurred) to the neighbouring settings of the grid (nan when
        it has none).
    volumes : ndarray of shape (sites, Z, Y, X), float32
        The reconstructions.
    seconds : float
        Solver time summed over sites.
    """

    tv_units: float
    l1_units: float
    tv: float
    l1: float
    stage: int
    discrepancy: tuple[float, ...]
    prediction_error: tuple[float, ...]
    reference: tuple[float, ...] | None
    stability: float
    volumes: np.ndarray = field(repr=False)
    seconds: float

    @property
    def mean_discrepancy(self) -> float:
        """Discrepancy ratio averaged over the sites."""
        return float(np.mean(self.discrepancy))

    @property
    def mean_prediction_error(self) -> float:
        """Held-out prediction error averaged over the sites (per pixel)."""
        return float(np.mean(self.prediction_error))

    @property
    def mean_reference(self) -> float | None:
        """Reference correlation averaged over the sites, or None without a reference."""
        return None if self.reference is None else float(np.mean(self.reference))


def weight_unit(model: PSFModel, noise: FrameNoise, sites: Iterable[Site]) -> float:
    """The unit ``u`` of the sweep (see the module notes), from the sites' middle frames.

    Returns
    -------
    float
        Positive; frame units times model units.
    """
    variances = [float(noise.variance(site.frames_3yx[1]).mean()) for site in sites]
    sigma = math.sqrt(max(float(np.mean(variances)), 1e-30))
    ny, nx = model.shape_out
    point = np.zeros((ny, nx), dtype=model.dtype)
    point[ny // 2, nx // 2] = 1.0
    back = np.asarray(model.backend.to_numpy(model.adjoint(model.backend.asarray(point))),
                      dtype=np.float64)
    norms = np.sqrt((back * back).sum(axis=(1, 2)))
    norm = float(np.median(norms))
    return sigma * (norm if norm > 0 else 1.0)


def _neighbours(values: tuple[float, ...], best: float) -> set[float]:
    """Half-decade neighbours of `best` on an axis whose coarse values are `values`."""
    positive = sorted(v for v in values if v > 0)
    if best == 0.0:
        return {0.0, positive[0] / FINE_STEP} if positive else {0.0}
    return {best / FINE_STEP, best, best * FINE_STEP}


def fine_grid(best_tv_units: float, best_l1_units: float, done: Iterable[tuple[float, float]]
              ) -> list[tuple[float, float]]:
    """Settings of the fine stage around the best coarse cell that are not yet done.

    Parameters
    ----------
    best_tv_units, best_l1_units : float
        Best coarse cell, in units of :func:`weight_unit`.
    done : iterable of (tv_units, l1_units)
        Settings already computed.

    Returns
    -------
    list of (tv_units, l1_units)
        Sorted; up to 8 settings.
    """
    finished = {(_key(t), _key(w)) for t, w in done}
    tvs = _neighbours(COARSE_TV_UNITS, best_tv_units)
    l1s = _neighbours(COARSE_L1_UNITS, best_l1_units)
    cells = sorted((t, w) for t in tvs for w in l1s)
    return [(t, w) for t, w in cells if (_key(t), _key(w)) not in finished]


def _key(value: float) -> float:
    return round(value, 9)
