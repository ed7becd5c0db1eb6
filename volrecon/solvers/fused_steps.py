"""The element-wise steps of one FISTA or Richardson–Lucy iteration, fused.

:mod:`volrecon.solvers.fista` and :mod:`volrecon.solvers.rl` are written in terms of these
steps; this module gives each two implementations with one contract:

* compiled (numba, CPU, float32): each step is one pass over its arrays that also returns the
  inner products and norms the iteration needs, split over the backend's threads by depth
  planes and written without the GIL.
* array (numpy or CuPy): whole-array expressions; the GPU path, the float64 path, and the
  reference the compiled steps are tested against on the CPU.

Every step that updates an array does so in place in the argument named in its docstring.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.solvers.tv import gradient, gradient_adjoint, tv_value

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.backend import Backend

__all__ = ["ArraySteps", "CompiledSteps", "steps_for"]


def steps_for(backend: Backend, dtype: Any, *, compiled: bool | None = None) -> ArraySteps:
    """The steps for `backend` and `dtype`: compiled on the CPU in float32 unless `compiled`
    is False."""
    if compiled is None:
        compiled = backend.device == "cpu" and np.dtype(dtype) == np.float32
    return CompiledSteps(backend) if compiled else ArraySteps(backend)


class ArraySteps:
    """Whole-array implementation (numpy or CuPy)."""

    def __init__(self, backend: Backend) -> None:
        self.be = backend
        self.xp = backend.xp

    def fista_gradient_step(self, y: Array, g: Array, v: Array, step: float, shift: float,
                            *, clip: bool) -> tuple[float, float, float]:
        """``g ← y − step·g − shift``, clipped at 0 with `clip`.

        With `clip` the new `g` is the next iterate ``u`` and the result is
        ``(⟨y − u, u − v⟩, ‖u‖², ‖u − v‖²)``, as :meth:`fista_products`; else ``(0, 0, 0)``.
        """
        xp = self.xp
        g *= -step
        g += y
        if shift:
            g -= shift
        if not clip:
            return (0.0, 0.0, 0.0)
        xp.maximum(g, 0, out=g)
        return self.fista_products(y, g, v)

    def fista_products(self, y: Array, u: Array, v: Array) -> tuple[float, float, float]:
        """``(⟨y − u, u − v⟩, ‖u‖², ‖u − v‖²)``: the restart test and the relative change."""
        delta = u - v
        return (self._dot(y - u, delta), self._dot(u, u), self._dot(delta, delta))

    def fista_products_tv(self, y: Array, u: Array, v: Array, wz: float,
                          ) -> tuple[float, float, float, float, float]:
        """:meth:`fista_products`, then ``Σu`` and ``TV(u)`` with depth weight `wz` (as
        :func:`~volrecon.solvers.tv.tv_value`): the objective's penalties at ``u``."""
        restart, norm, change = self.fista_products(y, u, v)
        return (restart, norm, change, float(u.sum(dtype=self.xp.float64)), tv_value(u, wz))

    def fista_momentum(self, y: Array, u: Array, v: Array, beta: float) -> None:
        """``y ← u + β(u − v)``."""
        xp = self.xp
        xp.subtract(u, v, out=y)
        y *= beta
        y += u

    def rl_update(self, v: Array, c: Array, denominator: Array) -> tuple[float, float]:
        """``c ← v ⊙ c / denominator``; returns ``(‖c − v‖², ‖c‖²)`` of the new `c`."""
        c /= denominator
        c *= v
        delta = c - v
        return (self._dot(delta, delta), self._dot(c, c))

    def rl_tv_update(self, v: Array, c: Array, sensitivity: Array, l1: float, tv: float,
                     floor: float, wz: float) -> tuple[float, float]:
        """``c ← v ⊙ c / max(sensitivity + l1 + tv·∇ᵀ(∇v/|∇v|), floor)`` (RL-TV); returns
        ``(‖c − v‖², ‖c‖²)`` of the new `c`.

        ``∇`` is the gradient of :mod:`volrecon.solvers.tv` on the field grown by one zero row
        and column, and ``|∇v|`` is floored at ``1e-8`` of its largest value.
        """
        xp = self.xp
        nz, ny, nx = v.shape
        padded = xp.zeros((nz, ny + 1, nx + 1), dtype=v.dtype)
        padded[:, :ny, :nx] = v
        g = gradient(padded, wz)
        norm = xp.sqrt((g * g).sum(axis=0))
        g /= xp.maximum(norm, 1e-8 * max(float(norm.max()), 1e-30))
        denominator = (sensitivity + l1) + tv * gradient_adjoint(g, wz)[:, :ny, :nx]
        denominator = xp.maximum(denominator, floor)
        return self.rl_update(v, c, denominator)

    def _dot(self, a: Array, b: Array) -> float:
        return float(self.xp.vdot(a.ravel(), b.ravel()).real)


class CompiledSteps(ArraySteps):
    """numba kernels, one pass per step, split over the backend's threads (float32 only)."""

    def fista_gradient_step(self, y: Array, g: Array, v: Array, step: float, shift: float,
                            *, clip: bool) -> tuple[float, float, float]:
        partial = np.zeros((y.shape[0], 3))
        f32 = np.float32
        self.be.run_split(_kernels().fista_gradient_step, y.shape[0], y, g, v, f32(step),
                          f32(shift), clip, partial)
        return _sums3(partial) if clip else (0.0, 0.0, 0.0)

    def fista_products(self, y: Array, u: Array, v: Array) -> tuple[float, float, float]:
        partial = np.zeros((y.shape[0], 3))
        self.be.run_split(_kernels().fista_products, y.shape[0], y, u, v, partial)
        return _sums3(partial)

    def fista_products_tv(self, y: Array, u: Array, v: Array, wz: float,
                          ) -> tuple[float, float, float, float, float]:
        partial = np.zeros((y.shape[0], 5))
        self.be.run_split(_kernels().fista_products_tv, y.shape[0], y, u, v, np.float32(wz),
                          partial)
        a, b, c, d, e = (float(s) for s in partial.sum(axis=0))
        return a, b, c, d, e

    def fista_momentum(self, y: Array, u: Array, v: Array, beta: float) -> None:
        self.be.run_split(_kernels().fista_momentum, y.shape[0], y, u, v, np.float32(beta))

    def rl_update(self, v: Array, c: Array, denominator: Array) -> tuple[float, float]:
        partial = np.zeros((v.shape[0], 2))
        self.be.run_split(_kernels().rl_update, v.shape[0], v, c, denominator, partial)
        return _sums2(partial)

    def rl_tv_update(self, v: Array, c: Array, sensitivity: Array, l1: float, tv: float,
                     floor: float, wz: float) -> tuple[float, float]:
        k = _kernels()
        f32 = np.float32
        peaks = np.zeros((v.shape[0], 1), dtype=np.float32)
        self.be.run_split(k.gradient_norm_max, v.shape[0], v, f32(wz), peaks)
        eps = f32(1e-8 * max(float(peaks.max()), 1e-30))
        partial = np.zeros((v.shape[0], 2))
        self.be.run_split(k.rl_tv_update, v.shape[0], v, c, sensitivity, f32(l1), f32(tv),
                          f32(floor), eps, f32(wz), partial)
        return _sums2(partial)


def _sums3(partial: np.ndarray) -> tuple[float, float, float]:
    """Column sums of per-plane partial sums (three columns), as floats."""
    a, b, c = (float(s) for s in partial.sum(axis=0))
    return a, b, c


def _sums2(partial: np.ndarray) -> tuple[float, float]:
    """Column sums of per-plane partial sums (two columns), as floats."""
    a, b = (float(s) for s in partial.sum(axis=0))
    return a, b


def _kernels() -> Any:
    """The numba module, imported (and compiled, or loaded from its cache) on first use."""
    from volrecon.solvers import fused_kernels

    return fused_kernels
