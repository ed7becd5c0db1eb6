"""The element-wise and per-frequency steps of one ADMM iteration, fused.

:mod:`volrecon.solvers.admm` is written in terms of these steps; this module gives each two
implementations with one contract:

* compiled (numba, CPU): each step is one pass over its arrays, split over the backend's
  threads by depth planes (spatial steps) or frequency rows (the volume solve). Written without
  the GIL, so the threads of a dask worker and the FFT threads run them side by side.
* array (numpy or CuPy): whole-array expressions; the GPU path, and the reference the compiled
  steps are tested against on the CPU.

Measured at 32×512×512 (padded 1024²), 2 cores: the numpy ADMM+TV iteration spent ~1.3 s in
~40 element-wise passes and temporaries beside 0.2 s of FFTs; the fused steps touch each array
once or twice per iteration.

Scaled duals are carried implicitly: ``wmg = v − γ`` and ``ymb = ∇v − β`` after each volume
update, which removes the separate dual-update passes (``γ ← v − wmg`` is read where it is
needed, see :func:`w_step`).
"""

from __future__ import annotations

import threading
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.solvers.norms import squared_norm
from volrecon.solvers.tv import gradient, gradient_adjoint

if TYPE_CHECKING:
    from collections.abc import Callable

    from volrecon._typing import Array
    from volrecon.backend import Backend

__all__ = ["FACTOR_CACHE_BYTES", "ArraySteps", "CompiledSteps", "steps_for"]

#: Bytes of volume-solve factor sets (with TV) a compiled steps object keeps, most recent
#: first; the most recent set is always kept. The steps object is the model's, so the sets
#: outlive a solve: the next frame of a warm chain starts from the same penalties. A set
#: holds 1.5× the bytes of Ĥ (pivots in float32, T⁻¹a in complex64): 6 MB at 16×128²,
#: 1.6 GB at Z = 64 on a 1024² sensor. So small problems keep one set per frame of a
#: temporal window (each its own μ₃ + weight·λ_k), and large ones only the current set (a
#: warm chain rarely changes it).
FACTOR_CACHE_BYTES = 256 << 20


def steps_for(backend: Backend, *, compiled: bool | None = None) -> ArraySteps:
    """The steps for `backend`: compiled on the CPU unless `compiled` is False."""
    if compiled is None:
        compiled = backend.device == "cpu"
    return CompiledSteps(backend) if compiled else ArraySteps(backend)


class ArraySteps:
    """Whole-array implementation (numpy or CuPy)."""

    def __init__(self, backend: Backend) -> None:
        self.be = backend
        self.xp = backend.xp

    def tv_dual_step(self, v: Array, ymb: Array, y_out: Array | None, kappa: float, rho: float,
                     tv_z_weight: float) -> None:
        """``y = ρ·shrink(∇v + β, κ)``, ``ymb ← ymb − ρ∇v + y`` (β = ∇v − ymb); y into `y_out`."""
        xp = self.xp
        g = gradient(v, tv_z_weight)
        u = 2 * g - ymb
        norm = xp.sqrt((u * u).sum(axis=0))
        factor = rho * (1 - kappa / xp.maximum(norm, kappa))
        u *= factor
        ymb += u
        ymb -= rho * g
        if y_out is not None:
            y_out[...] = u

    def w_step(self, v: Array, wmg: Array, rhs: Array | None, ymb: Array | None,
               w_out: Array | None, thresh: float, rho: float, mu2: float, mu3: float,
               tv_z_weight: float, support_yx: tuple[int, int], *, compare: bool = False,
               ) -> tuple[float, float]:
        """``w = Π_{support,≥0}(v + γ − thresh)``, ``wmg ← (1−ρ)v − γ + ρw``, and with TV
        ``rhs = μ₃·wmg + μ₂∇ᵀymb``; w into `w_out`. With `compare`, returns
        ``(‖w − w_out‖², ‖w‖²)`` with `w_out` taken before it is overwritten (one buffer serves
        both iterates); else ``(0, 0)``."""
        xp = self.xp
        ny, nx = support_yx
        gamma = v - wmg
        w = v + gamma
        w -= thresh
        xp.maximum(w, 0, out=w)
        w[:, ny:, :] = 0
        w[:, :ny, nx:] = 0
        wmg[...] = (1 - rho) * v - gamma + rho * w
        if rhs is not None and ymb is not None:
            rhs[...] = mu3 * wmg + mu2 * gradient_adjoint(ymb, tv_z_weight)
        change = (0.0, 0.0)
        if w_out is not None:
            if compare:
                change = (self._sq(w - w_out), self._sq(w))
            w_out[...] = w
        return change

    def volume_solve(self, r: Array, h: Array, xh: Array, lateral: Array | None, scale: float,
                     mu1: float, mu2: float, mu3: float, e: float, *,
                     gain: Array | None = None) -> Array:
        """Solve ``(μ₁ a aᴴ + T) ṽ = scale·r + a·xh`` per lateral frequency, in place in `r`.

        ``a = conj(h)`` with `h` the model's transfer functions Ĥ, ``T = (μ₂L(f) + μ₃) I + e·N``
        with N the Neumann depth Laplacian (tridiagonal, Thomas algorithm); Sherman–Morrison
        handles the rank-one term. Returns ``(M v)^ = aᴴṽ``. `gain` is ``Σ_z|Ĥ_z|²`` of `h`
        where the caller has it (the compiled solve without TV uses it, else computes it).
        """
        xp = self.xp
        a = h.conj()
        nz = r.shape[0]
        base = mu3 if lateral is None else mu2 * lateral + mu3
        rhs = scale * r + a * xh
        u = xp.empty_like(rhs)
        p = xp.empty_like(a)
        cp: list[Any] = []
        for k in range(nz):
            nk = 0.0 if nz == 1 else (1.0 if k in (0, nz - 1) else 2.0)
            den = base + e * nk + (e * cp[k - 1] if k else 0.0)
            inv = 1.0 / den
            cp.append(-e * inv)
            u[k] = ((rhs[k] + e * u[k - 1]) if k else rhs[k]) * inv
            p[k] = ((a[k] + e * p[k - 1]) if k else a[k]) * inv
        for k in range(nz - 2, -1, -1):
            u[k] -= cp[k] * u[k + 1]
            p[k] -= cp[k] * p[k + 1]
        s = (a.conj() * u).sum(axis=0)
        q = (a.conj() * p).real.sum(axis=0)
        mv = s / (1 + mu1 * q)
        r[...] = u - (mu1 * mv) * p
        return mv.astype(r.dtype)

    def window_dct(self, a: Array, out: Array, *, inverse: bool = False) -> Array:
        """The orthonormal DCT-II (or with `inverse` its inverse) of `a` along axis 0, the
        window, into `out` (which may be `a`); returns `out`."""
        transform = self.be.fft.idct if inverse else self.be.fft.dct
        out[...] = transform(a, type=2, axis=0, norm="ortho")
        return out

    def gradient_minus(self, v: Array, p: Array, tv_z_weight: float) -> None:
        """``p ← ∇v − p``: ymb from β, and β from ymb."""
        p *= -1
        p += gradient(v, tv_z_weight)

    def w_norms(self, v: Array, w: Array, wmg: Array) -> tuple[float, ...]:
        """Squared norms ``(‖v−w‖², ‖v‖², ‖w‖², ‖γ‖²)`` with γ = v − wmg."""
        return tuple(self._sq(x) for x in (v - w, v, w, v - wmg))

    def tv_norms(self, v: Array, y: Array, y_prev: Array, ymb: Array, tv_z_weight: float,
                 rho: float) -> tuple[float, ...]:
        """Squared ``(‖∇v − y/ρ‖², ‖∇v‖², ‖y/ρ‖², ‖∇ᵀ(y − y_prev)/ρ‖², ‖∇ᵀβ‖²)``."""
        g = gradient(v, tv_z_weight)
        return (self._sq(g - y / rho), self._sq(g), self._sq(y / rho),
                self._sq(gradient_adjoint((y - y_prev) / rho, tv_z_weight)),
                self._sq(gradient_adjoint(g - ymb, tv_z_weight)))

    def _sq(self, a: Array) -> float:
        return squared_norm(a)


class CompiledSteps(ArraySteps):
    """numba kernels, one pass per step, split over the backend's FFT thread count."""

    def __init__(self, backend: Backend) -> None:
        super().__init__(backend)
        # Volume-solve factors by (arrays, penalties), kept across the solves of one model
        # (the model owns this object, see admm.solve_admm_window) and shared by its threads.
        # key -> (arrays the key's ids stand for, kept alive so an id is never reused while
        # its entry lasts; the factors)
        self._cache: dict[tuple[Any, ...], tuple[tuple[Any, ...], tuple[Array, ...]]] = {}
        self._lock = threading.Lock()

    def _split(self, kernel: Callable[..., None], n: int, *args: Any) -> None:
        # The backend's split: the calling thread runs the first range, pool threads the rest.
        self.be.run_split(kernel, n, *args)

    def tv_dual_step(self, v: Array, ymb: Array, y_out: Array | None, kappa: float, rho: float,
                     tv_z_weight: float) -> None:
        k = _kernels()
        save = y_out is not None
        self._split(k.tv_dual, v.shape[0], v, ymb, y_out if save else _DUMMY4, save,
                    np.float32(kappa), np.float32(rho), np.float32(tv_z_weight))

    def w_step(self, v: Array, wmg: Array, rhs: Array | None, ymb: Array | None,
               w_out: Array | None, thresh: float, rho: float, mu2: float, mu3: float,
               tv_z_weight: float, support_yx: tuple[int, int], *, compare: bool = False,
               ) -> tuple[float, float]:
        k = _kernels()
        use_tv = rhs is not None and ymb is not None
        partial = np.zeros((v.shape[0], 2))
        self._split(k.w_update, v.shape[0], v, wmg, rhs if use_tv else _DUMMY3,
                    ymb if use_tv else _DUMMY4, use_tv,
                    w_out if w_out is not None else _DUMMY3, w_out is not None,
                    compare and w_out is not None, partial,
                    np.float32(thresh), np.float32(rho), np.float32(mu2), np.float32(mu3),
                    np.float32(tv_z_weight), support_yx[0], support_yx[1])
        change, norm = partial.sum(axis=0, dtype=np.float64)
        return float(change), float(norm)

    def volume_solve(self, r: Array, h: Array, xh: Array, lateral: Array | None, scale: float,
                     mu1: float, mu2: float, mu3: float, e: float, *,
                     gain: Array | None = None) -> Array:
        """As :meth:`ArraySteps.volume_solve`, in two parts: the factors that depend only on
        `h`, `lateral` and the penalties (the Thomas pivots, ``p = T⁻¹a`` and
        ``1/(1 + μ₁aᴴp)``), computed once per penalty set and kept while it lasts, and one
        pass over the data per call (a Thomas sweep of `r` alone, ``aᴴT⁻¹r = pᴴr``).
        Without TV (``T = μ₃I``) the factors are closed-form and nothing is kept but
        ``Σ_z|Ĥ_z|²``."""
        k = _kernels()
        mv = np.empty(r.shape[1:], dtype=r.dtype)
        f32 = np.float32
        rv, xv, mvv = _real_view(r), _real_view(xh), _real_view(mv)
        if lateral is None and e == 0:
            if gain is None or gain.dtype != np.float32:
                gain = self._factors(("gain", id(h)), (h,), lambda: _gain(h))[0]
            self._split(k.volume_apply_diagonal, r.shape[1], rv, _real_view(h), gain, xv,
                        f32(scale), f32(mu1), f32(mu3), mvv)
            return mv
        lat = lateral if lateral is not None else np.zeros((1, 1), dtype=np.float32)

        def factors() -> tuple[Array, ...]:
            inv = np.empty(h.shape, dtype=np.float32)
            p = np.empty_like(h)
            g = np.empty(h.shape[1:], dtype=np.float32)
            qg = np.empty_like(g)
            self._split(k.volume_factors, h.shape[1], _real_view(h), lat, lateral is not None,
                        f32(mu1), f32(mu2), f32(mu3), f32(e), inv, _real_view(p), g, qg)
            return inv, p, g, qg

        key = ("tv", id(h), id(lateral), f32(mu1), f32(mu2), f32(mu3), f32(e))
        inv, p, g, qg = self._factors(key, (h, lateral), factors)
        self._split(k.volume_apply, r.shape[1], rv, _real_view(p), inv, g, qg, xv, f32(scale),
                    f32(mu1), f32(e), mvv)
        return mv

    def _factors(self, key: tuple[Any, ...], pins: tuple[Any, ...],
                 make: Callable[[], tuple[Array, ...]]) -> tuple[Array, ...]:
        """The cached `make()` for `key` (whose ids name the arrays in `pins`); keeps the most
        recent sets within :data:`FACTOR_CACHE_BYTES`, and always the newest."""
        with self._lock:
            entry = self._cache.get(key)
        if entry is None or any(a is not b for a, b in zip(entry[0], pins, strict=True)):
            entry = (pins, make())  # outside the lock: other threads' solves go on

        def size(item: tuple[tuple[Any, ...], tuple[Array, ...]]) -> int:
            return sum(int(a.nbytes) for a in item[1])

        with self._lock:
            self._cache.pop(key, None)
            self._cache[key] = entry  # most recent last
            while len(self._cache) > 1 and sum(map(size, self._cache.values())) > \
                    FACTOR_CACHE_BYTES:
                del self._cache[next(iter(self._cache))]
        return entry[1]

    def window_dct(self, a: Array, out: Array, *, inverse: bool = False) -> Array:
        """As :meth:`ArraySteps.window_dct`, as a W×W matrix product in one pass over the
        frames' rows (a strided length-W FFT along the window took ~5× the 2-D FFTs' time
        per element at W = 8); at W = 8 with the matrix in registers."""
        if not (a.flags.c_contiguous and out.flags.c_contiguous):
            raise ValueError("the compiled window transform needs C-contiguous arrays")
        matrix = _dct_matrix(a.shape[0])
        rows_a = a.reshape(a.shape[0], -1, a.shape[-1])
        rows_out = out.reshape(rows_a.shape)
        kernel = _kernels().window_transform8 if a.shape[0] == 8 else \
            _kernels().window_transform
        self._split(kernel, rows_a.shape[1], rows_a, rows_out,
                    matrix.T.copy() if inverse else matrix)
        return out

    def gradient_minus(self, v: Array, p: Array, tv_z_weight: float) -> None:
        self._split(_kernels().gradient_minus, v.shape[0], v, p, np.float32(tv_z_weight))

    def w_norms(self, v: Array, w: Array, wmg: Array) -> tuple[float, ...]:
        partial = np.zeros((v.shape[0], 4))
        self._split(_kernels().w_norms, v.shape[0], v, w, wmg, partial)
        return tuple(float(s) for s in partial.sum(axis=0))

    def tv_norms(self, v: Array, y: Array, y_prev: Array, ymb: Array, tv_z_weight: float,
                 rho: float) -> tuple[float, ...]:
        partial = np.zeros((v.shape[0], 5))
        self._split(_kernels().tv_norms, v.shape[0], v, y, y_prev, ymb, np.float32(tv_z_weight),
                    np.float32(1.0 / rho), partial)
        return tuple(float(s) for s in partial.sum(axis=0))


def _dct_matrix(n: int) -> np.ndarray:
    """The orthonormal DCT-II matrix ``C[k, m] = s_k cos(πk(2m + 1)/(2n))`` in float32
    (``s_0 = √(1/n)``, else ``√(2/n)``); its inverse is its transpose."""
    k = np.arange(n)[:, None]
    m = np.arange(n)[None, :]
    matrix: np.ndarray = np.cos(np.pi * k * (2 * m + 1) / (2 * n)) * np.sqrt(2.0 / n)
    matrix[0] /= np.sqrt(2.0)
    return np.asarray(matrix, dtype=np.float32)


def _gain(h: Array) -> tuple[Array]:
    """``Σ_z |Ĥ_z|²`` (Py, F) in float32, one plane at a time."""
    gain = np.zeros(h.shape[1:], dtype=np.float32)
    for plane in h:
        gain += plane.real**2 + plane.imag**2
    return (gain,)


def _real_view(a: Array) -> Array:
    """A C-contiguous complex64 array as float32 with (re, im) pairs along the last axis."""
    if a.dtype != np.complex64 or not a.flags.c_contiguous:
        raise ValueError("the compiled volume solve needs C-contiguous complex64 spectra")
    return a.view(np.float32)


_DUMMY3 = np.zeros((1, 1, 1), dtype=np.float32)
_DUMMY4 = np.zeros((1, 1, 1, 1), dtype=np.float32)
def _kernels() -> Any:
    """The numba module, imported (and compiled, or loaded from its cache) on first use."""
    from volrecon.solvers import admm_kernels

    return admm_kernels
