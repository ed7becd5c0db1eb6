"""Depth low-rank compression of a PSF stack by truncated singular value decomposition."""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from volrecon.errors import ConfigError, DataError, ShapeError, VolreconWarning

__all__ = [
    "DepthFactors",
    "factor_psf_stack",
    "retained_energy",
    "select_rank",
    "stack_singular_values",
]

#: Pixels per block when accumulating the Z × Z Gram matrix (bounds float64 temporaries).
_BLOCK = 1 << 18


@dataclass(frozen=True)
class DepthFactors:
    """Truncated SVD ``H ≈ U_r S_r V_rᵀ`` of the (Z × pixels) stack matrix.

    Attributes
    ----------
    kernels_ryx : ndarray of shape (r, Y, X), float32
        Orthonormal lateral kernels (rows of ``V_rᵀ``).
    weights_zr : ndarray of shape (Z, r), float32
        Depth weights ``U_r S_r``: plane ``z`` is ``Σ_r weights[z, r] kernels[r]``.
    singular_values : ndarray of shape (min(Z, pixels),), float64
        All singular values, descending.
    rank : int
        Kernels kept.
    """

    kernels_ryx: np.ndarray
    weights_zr: np.ndarray
    singular_values: np.ndarray
    rank: int

    @property
    def retained_energy(self) -> np.ndarray:
        """Cumulative fraction ``Σ_{i<r} s_i² / Σ s_i²`` for r = 1 … (shape of the spectrum)."""
        return retained_energy(self.singular_values)

    @property
    def truncation_error(self) -> float:
        """Frobenius norm of the discarded part, ``sqrt(Σ_{i>=r} s_i²)``."""
        return float(np.sqrt(np.sum(self.singular_values[self.rank :] ** 2)))


def retained_energy(singular_values: np.ndarray) -> np.ndarray:
    """Cumulative fraction of the squared Frobenius norm kept by the leading terms."""
    power = np.asarray(singular_values, dtype=np.float64) ** 2
    total = power.sum()
    return np.cumsum(power) / total if total > 0 else np.ones_like(power)


def select_rank(singular_values: np.ndarray, energy: float) -> int:
    """Smallest rank whose leading terms keep at least `energy` of the squared norm.

    Raises
    ------
    ConfigError
        If `energy` is not in (0, 1].
    """
    if not (isinstance(energy, int | float) and 0 < energy <= 1):
        raise ConfigError(f"--energy must be a fraction in (0, 1], e.g. 0.999; got {energy!r}")
    kept = retained_energy(singular_values)
    # A tolerance of a few float64 ulps keeps energy = 1 reachable despite rounding.
    return min(int(np.searchsorted(kept, energy - 1e-12)) + 1, int(kept.size))


def stack_singular_values(psf_zyx: Any) -> np.ndarray:
    """Singular values of the (Z × pixels) matrix of a PSF stack, descending, float64.

    Raises
    ------
    ShapeError
        If the stack is not 3-D.
    DataError
        If it is not finite or all zero.
    """
    stack = np.asarray(psf_zyx)
    if stack.ndim != 3:
        raise ShapeError(f"psf_zyx must have 3 axes (Z, Y, X); got shape {stack.shape}")
    return _gram_svd(stack.reshape(stack.shape[0], -1))[0]


def _gram_svd(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Singular values and left singular vectors of a (Z × P) matrix via its Gram matrix."""
    if not np.isfinite(matrix).all():
        raise DataError("psf_zyx contains NaN or Inf; clean the PSF stack first")
    z = matrix.shape[0]
    gram = np.zeros((z, z))
    for start in range(0, matrix.shape[1], _BLOCK):
        block = matrix[:, start : start + _BLOCK].astype(np.float64)
        gram += block @ block.T
    eigenvalues, vectors = np.linalg.eigh(gram)
    order = np.argsort(eigenvalues)[::-1]
    singular = np.sqrt(np.clip(eigenvalues[order], 0.0, None))
    if singular[0] == 0:
        raise DataError("psf_zyx is all zero; nothing to compress")
    return singular, vectors[:, order]


def factor_psf_stack(psf_zyx: Any, *, rank: int | str, energy: float = 0.999) -> DepthFactors:
    """Approximate a PSF stack by `rank` lateral kernels shared across depth [1]_.

    Parameters
    ----------
    psf_zyx : ndarray of shape (Z, Y, X)
        Cleaned, registered PSF stack.
    rank : int or "auto"
        Kernels kept, 1 to Z; ``"auto"``: the smallest rank keeping `energy` of the squared
        Frobenius norm (:func:`select_rank`).
    energy : float
        Fraction in (0, 1] for ``rank="auto"``.

    Returns
    -------
    DepthFactors

    Raises
    ------
    ShapeError
        If the stack is not 3-D.
    DataError
        If it is not finite or all zero.
    ConfigError
        If `rank` is not "auto" or an integer from 1 to Z.

    Notes
    -----
    The SVD is taken through the Z × Z Gram matrix ``H Hᵀ`` accumulated in float64 over
    pixel blocks, so memory stays near one copy of the stack however many pixels it has.
    Singular values below about ``1e-7·s_max`` are then inexact (they carry less than
    1e-14 of the energy), so a requested rank is lowered, with a VolreconWarning, to the
    number of singular values above that level.

    References
    ----------
    .. [1] C. Eckart, G. Young, "The approximation of one matrix by another of lower rank",
       Psychometrika 1 (1936) 211-218.

    Examples
    --------
    >>> import numpy as np
    >>> stack = np.stack([np.full((4, 4), c, np.float32) for c in (1.0, 2.0, 3.0)])
    >>> factor_psf_stack(stack, rank="auto").rank
    1
    """
    stack = np.asarray(psf_zyx)
    if stack.ndim != 3:
        raise ShapeError(f"psf_zyx must have 3 axes (Z, Y, X); got shape {stack.shape}")
    z = stack.shape[0]
    if isinstance(rank, str):
        if rank != "auto":
            raise ConfigError(f"--rank must be an integer from 1 to {z} or 'auto'; got {rank!r}")
    elif not (isinstance(rank, int | np.integer) and 1 <= rank <= z):
        raise ConfigError(f"--rank must be an integer from 1 to Z = {z} (the number of planes) "
                          f"or 'auto'; got {rank!r}")
    matrix = stack.reshape(z, -1)
    singular, vectors = _gram_svd(matrix)
    chosen = select_rank(singular, energy) if rank == "auto" else int(rank)
    usable = int(np.sum(singular > singular[0] * 1e-7))
    if chosen > usable:
        warnings.warn(f"the PSF stack has only {usable} singular values above 1e-7 of the "
                      f"largest, so rank {chosen} was lowered to {usable}; the extra terms "
                      "would be rounding noise", VolreconWarning, stacklevel=2)
        chosen = usable
    u = vectors[:, :chosen]
    s = singular[:chosen]
    kernels = np.empty((chosen, matrix.shape[1]))
    for start in range(0, matrix.shape[1], _BLOCK):
        block = matrix[:, start : start + _BLOCK].astype(np.float64)
        kernels[:, start : start + _BLOCK] = (u.T @ block) / s[:, None]
    # Fix the sign ambiguity of each singular pair: the kernel's largest value is positive.
    for i in range(chosen):
        if kernels[i].max() < -kernels[i].min():
            kernels[i] *= -1.0
            u[:, i] *= -1.0
    return DepthFactors(
        kernels_ryx=kernels.reshape(chosen, *stack.shape[1:]).astype(np.float32),
        weights_zr=(u * s).astype(np.float32),
        singular_values=singular,
        rank=chosen,
    )
