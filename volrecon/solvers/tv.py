"""Total variation on a volume: gradient, its adjoint, the TV value and the TV proximal map.

Definition used everywhere in volrecon (solvers, objective reports, tests)::

    TV(v) = Σ_{z,y,x} sqrt( (Dx v)² + (Dy v)² + (w_z · Dz v)² )

with forward differences. Laterally the volume is extended by zeros outside the field of
view (Dirichlet ends: the step from the last pixel to the zero beyond it counts, and so does
the step into the first pixel), implemented as periodic differences on a grid at least one
pixel larger than the field. Along depth the ends are Neumann: ``Dz v = 0`` on the last
plane. ``w_z`` (``tv_z_weight``) weighs depth steps against lateral ones; 1 treats a voxel as
a cube, ``pixel_size_um / depth_step_um`` weighs gradients per micrometre.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from volrecon._typing import Array

__all__ = ["divergence", "gradient", "gradient_adjoint", "tv_prox", "tv_value"]


def gradient(v: Array, z_weight: float, out: Array | None = None) -> Array:
    """Forward differences of `v` (Z, Y, X) → (3, Z, Y, X): periodic in y, x; Neumann in z."""
    xp = _xp(v)
    g = xp.empty((3, *v.shape), dtype=v.dtype) if out is None else out
    xp.subtract(v[:, 1:], v[:, :-1], out=g[0, :, :-1])
    xp.subtract(v[:, 0], v[:, -1], out=g[0, :, -1])
    xp.subtract(v[:, :, 1:], v[:, :, :-1], out=g[1, :, :, :-1])
    xp.subtract(v[:, :, 0], v[:, :, -1], out=g[1, :, :, -1])
    xp.subtract(v[1:], v[:-1], out=g[2, :-1])
    g[2, -1] = 0
    if z_weight != 1.0:
        g[2, :-1] *= z_weight
    return g


def gradient_adjoint(g: Array, z_weight: float, out: Array | None = None) -> Array:
    """Exact adjoint of :func:`gradient`: (3, Z, Y, X) → (Z, Y, X)."""
    xp = _xp(g)
    gy, gx, gz = g[0], g[1], g[2]
    out = xp.empty(g.shape[1:], dtype=g.dtype) if out is None else out
    # Dyᵀ p = p[y-1] - p[y] and Dxᵀ p = p[x-1] - p[x] (periodic)
    xp.subtract(gy[:, :-1], gy[:, 1:], out=out[:, 1:])
    xp.subtract(gy[:, -1], gy[:, 0], out=out[:, 0])
    out[:, :, 1:] += gx[:, :, :-1]
    out[:, :, 0] += gx[:, :, -1]
    out -= gx
    # Dzᵀ p = w (p[z-1] - p[z]) with p[-1] = 0 and the last row of p unused
    if out.shape[0] > 1:
        if z_weight == 1.0:
            out[1:] += gz[:-1]
            out[:-1] -= gz[:-1]
        else:
            out[1:] += z_weight * gz[:-1]
            out[:-1] -= z_weight * gz[:-1]
    return out


def divergence(g: Array, z_weight: float) -> Array:
    """``-gradientᵀ g``, the discrete divergence."""
    return -gradient_adjoint(g, z_weight)


def tv_value(v: Array, z_weight: float) -> float:
    """TV of a volume on its field (Z, Y, X); pads one zero row/column for the Dirichlet ends."""
    xp = _xp(v)
    padded = xp.zeros((v.shape[0], v.shape[1] + 1, v.shape[2] + 1), dtype=v.dtype)
    padded[:, : v.shape[1], : v.shape[2]] = v
    return tv_value_periodic(padded, z_weight)


def tv_value_periodic(v: Array, z_weight: float) -> float:
    """TV with periodic lateral differences on the grid `v` is given on."""
    xp = _xp(v)
    g = gradient(v, z_weight)
    return float(xp.sqrt((g * g).sum(axis=0)).sum(dtype=xp.float64))


def tv_prox(z: Array, weight: float, z_weight: float, *, iterations: int = 10,
            dual: Array | None = None, nonnegative: bool = True, overwrite_dual: bool = False,
            out: Array | None = None, scratch: Array | None = None, threads: int = 1,
            compiled: bool | None = None) -> tuple[Array, Array]:
    """Proximal map of ``weight · TV`` (plus non-negativity) by fast gradient projection [1]_.

    Solves ``argmin_u ½‖u − z‖² + weight·TV(u)`` subject to ``u ≥ 0`` on the field with
    Dirichlet lateral ends, through its dual: ``u = P(z − weight·∇ᵀp)`` with ``|p| ≤ 1``
    point-wise, accelerated as in [1]_.

    Parameters
    ----------
    z : array (Z, Y, X)
        Point to project, on the field.
    weight : float
        TV weight (> 0).
    z_weight : float
        Depth weighting of the TV.
    iterations : int
        Dual iterations.
    dual : array (3, Z, Y+1, X+1), optional
        Warm start of the dual variable (from a previous call).
    nonnegative : bool
        Also project onto ``u ≥ 0``.
    overwrite_dual : bool
        Iterate in `dual` itself (and return it) instead of a copy: saves a copy when the
        caller hands back the dual of the previous call and no longer needs it.
    out : array (Z, Y, X), optional
        Where to write ``u`` (and return it); may be `z` itself.
    scratch : array (3, Z, Y+1, X+1), optional
        Working space of the compiled path (any values; ignored by the array path): saves
        allocating it on every call.
    threads : int
        Threads for the compiled path (≥ 1).
    compiled : bool, optional
        Use the numba kernels of :mod:`volrecon.solvers.fused_kernels`: one sweep per
        iteration that makes the primal point plane by plane just ahead of the dual step, so
        only the dual is read and written in memory. Default: for C-contiguous
        float32 numpy arrays; CuPy and float64 arrays take the array path.

    Returns
    -------
    u : array (Z, Y, X)
    dual : array (3, Z, Y+1, X+1)
        Pass back as `dual` next time.

    Notes
    -----
    With ``L = 8 + 4 w_z² ≥ ‖∇‖²``, ``λ`` = `weight`, ``t₁ = 1`` and ``r₁ = p₀`` (zero or
    `dual`), iteration ``k = 1 … iterations`` is::

        u_k     = P(z − λ ∇ᵀ r_k)
        p_k     = Π(r_k + ∇u_k / (λ L))
        t_{k+1} = (1 + sqrt(1 + 4 t_k²)) / 2
        r_{k+1} = p_k + (t_k − 1) / t_{k+1} · (p_k − p_{k−1})

    where ``P`` projects on ``u ≥ 0`` (or is the identity) and ``Π`` projects the three
    components at each voxel on the unit ball; the result is ``P(z − λ∇ᵀp)`` of the last
    ``p``. Warm-started from the dual of a nearby problem (the previous FISTA iterate), a few
    iterations give an inexact prox whose error shrinks as the outer iteration converges.

    References
    ----------
    .. [1] A. Beck, M. Teboulle, "Fast gradient-based algorithms for constrained total
       variation image denoising and deblurring problems", IEEE TIP 18 (2009).

    Examples
    --------
    >>> import numpy as np
    >>> z = np.zeros((1, 4, 4), np.float32); z[0, 1:3, 1:3] = 1.0
    >>> u, dual = tv_prox(z, 0.1, 1.0, iterations=50)
    >>> u.shape, dual.shape, round(float(u.max()), 2)
    ((1, 4, 4), (3, 1, 5, 5), 0.85)
    """
    xp = _xp(z)
    nz, ny, nx = z.shape
    if dual is None:
        p = xp.zeros((3, nz, ny + 1, nx + 1), dtype=z.dtype)
    else:
        p = dual if overwrite_dual else dual.copy()
    if compiled is None:
        compiled = _compilable(z, p, out, scratch)
    # ‖∇‖² ≤ 4 + 4 + 4 w_z² for periodic/Neumann forward differences.
    step = 1.0 / (weight * (8.0 + 4.0 * z_weight * z_weight))
    if compiled:
        if scratch is None:
            scratch = xp.empty_like(p)
        if out is None:
            out = xp.empty((nz, ny, nx), dtype=z.dtype)
        _tv_prox_compiled(z, p, weight, z_weight, step, iterations, nonnegative, threads,
                          out, scratch)
        return out, p
    zp = xp.zeros((nz, ny + 1, nx + 1), dtype=z.dtype)
    zp[:, :ny, :nx] = z
    r = p.copy()
    t = 1.0
    for _ in range(iterations):
        u = _project(zp - weight * gradient_adjoint(r, z_weight), ny, nx, nonnegative)
        q = r + step * gradient(u, z_weight)
        norm = xp.sqrt((q * q).sum(axis=0))
        xp.maximum(norm, 1.0, out=norm)
        q /= norm
        t_next = (1.0 + (1.0 + 4.0 * t * t) ** 0.5) / 2.0
        r = q + ((t - 1.0) / t_next) * (q - p)
        p[...] = q
        t = t_next
    u = _project(zp - weight * gradient_adjoint(p, z_weight), ny, nx, nonnegative)
    if out is None:
        return xp.ascontiguousarray(u[:, :ny, :nx]), p
    out[...] = u[:, :ny, :nx]
    return out, p


def _compilable(*arrays: Any) -> bool:
    import numpy as np

    return all(a is None or (isinstance(a, np.ndarray) and a.dtype == np.float32
                             and a.flags.c_contiguous) for a in arrays)


def _tv_prox_compiled(z: Array, p: Array, weight: float, z_weight: float, step: float,
                      iterations: int, nonnegative: bool, threads: int, out: Array,
                      scratch: Array) -> None:
    """The iteration of :func:`tv_prox`, one fused sweep per step; ``u`` into `out`, the dual
    in `p`, ``r`` in `scratch`."""
    import numpy as np

    from volrecon.backend import get_backend
    from volrecon.solvers import fused_kernels as k

    be = get_backend("cpu", threads=threads)
    nz, ny, nx = z.shape
    f32 = np.float32
    weight32, wz, step32 = f32(weight), f32(z_weight), f32(step)
    bounds = np.array(be.split_bounds(nz), dtype=np.int64)
    starts = np.zeros((bounds.size - 1, ny + 1, nx + 1), dtype=np.float32)
    t = 1.0
    r = scratch
    np.copyto(r, p)  # r₁ = p₀ (in a separate array: aliased rows would not vectorise)
    for _ in range(iterations):
        t_next = (1.0 + (1.0 + 4.0 * t * t) ** 0.5) / 2.0
        k.tv_primal_starts(z, r, bounds, weight32, wz, nonnegative, starts)
        be.run_split(k.tv_sweep, nz, z, p, r, starts, bounds, weight32, step32,
                     f32((t - 1.0) / t_next), wz, nonnegative)
        t = t_next
    be.run_split(k.tv_primal, nz, z, p, weight32, wz, nonnegative, out)


def _project(u: Array, ny: int, nx: int, nonnegative: bool) -> Array:
    u[:, ny:, :] = 0
    u[:, :, nx:] = 0
    if nonnegative:
        _xp(u).maximum(u, 0, out=u)
    return u


def _xp(a: Any) -> Any:
    import numpy as np

    if isinstance(a, np.ndarray):
        return np
    import cupy  # only reached for CuPy arrays

    return cupy
