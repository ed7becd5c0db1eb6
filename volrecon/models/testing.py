"""Checks users can run on PSF models of their own."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel

__all__ = ["dot_test"]


def dot_test(op: PSFModel, *, rng: np.random.Generator, rtol: float = 1e-5) -> float:
    """Raise AssertionError unless <A x, y> equals <x, Aᵀ y> to within `rtol`.

    Returns the measured gap relative to ``|Ax| |y|``.
    """
    x = rng.standard_normal(op.shape_in).astype(op.dtype)
    y = rng.standard_normal(op.shape_out).astype(op.dtype)
    ax = op.backend.to_numpy(op.forward(x)).astype(np.float64)
    aty = op.backend.to_numpy(op.adjoint(y)).astype(np.float64)
    lhs = float(np.vdot(ax, y))
    rhs = float(np.vdot(x.astype(np.float64), aty))
    scale = float(np.linalg.norm(ax) * np.linalg.norm(y))
    gap = abs(lhs - rhs) / scale if scale > 0 else abs(lhs - rhs)
    if gap > rtol:
        raise AssertionError(
            f"{type(op).__name__}: <Ax, y> = {lhs:.7e} but <x, Aᵀy> = {rhs:.7e}; "
            f"gap {gap:.1e} of |Ax||y| exceeds rtol = {rtol:.0e}"
        )
    return gap
