# mypy: disallow-untyped-defs=False, disallow-untyped-decorators=False
# (numba kernels: plain loops over arrays, typed by numba at compile time)
"""numba kernels behind :mod:`volrecon.solvers.fused_steps` (FISTA, Richardson–Lucy, TV prox).

Each kernel works on the depth planes ``[lo, hi)`` so that the caller can split one step over
threads; all release the GIL. Volumes are C-contiguous float32 ``(Z, Y, X)``; TV duals are
``(3, Z, Y+1, X+1)`` with components (y, x, z) on the field grown by one zero row and column,
as in :mod:`volrecon.solvers.tv` (periodic lateral differences there give Dirichlet ends, depth
ends are Neumann, depth steps are weighted by ``wz``). Sums for inner products and norms are
float32 per row and float64 per plane, written to ``partial[z]``, so they do not depend on the
thread split. Compiled on first use and cached next to this file.
"""

from __future__ import annotations

import numba
import numpy as np

# No nnan/ninf (a diverging frame must stay visible as NaN/Inf). "reassoc" only where a kernel
# sums (it lets the row sums vectorise); the element-wise results are the same expressions as
# the array path, up to float32 rounding.
_FAST = {"arcp", "contract", "afn", "nsz"}
_jit = numba.njit(nogil=True, cache=True, error_model="numpy", fastmath=_FAST)
_jit_sum = numba.njit(nogil=True, cache=True, error_model="numpy", fastmath=_FAST | {"reassoc"})
_ZERO = np.float32(0.0)
_ONE = np.float32(1.0)


# ------------------------------------------------------------------------------------ FISTA
@_jit_sum
def fista_gradient_step(y, g, v, step, shift, clip, partial, lo, hi):
    """g ← y − step·g − shift, clipped at 0 with `clip`; with `clip` also
    partial[z] = (⟨y − g, g − v⟩, ‖g‖², ‖g − v‖²) of the new g."""
    _, ny, nx = y.shape
    for z in range(lo, hi):
        acc = np.zeros(3)
        for i in range(ny):
            yr, gr, vr = y[z, i], g[z, i], v[z, i]
            if clip:
                s0 = s1 = s2 = _ZERO
                for j in range(nx):
                    u = max(yr[j] - step * gr[j] - shift, _ZERO)
                    gr[j] = u
                    d = u - vr[j]
                    s0 += (yr[j] - u) * d
                    s1 += u * u
                    s2 += d * d
                acc[0] += s0
                acc[1] += s1
                acc[2] += s2
            else:
                for j in range(nx):
                    gr[j] = yr[j] - step * gr[j] - shift
        partial[z, :] = acc


@_jit_sum
def fista_products(y, u, v, partial, lo, hi):
    """partial[z] = (⟨y − u, u − v⟩, ‖u‖², ‖u − v‖²)."""
    _, ny, nx = y.shape
    for z in range(lo, hi):
        acc = np.zeros(3)
        for i in range(ny):
            yr, ur, vr = y[z, i], u[z, i], v[z, i]
            s0 = s1 = s2 = _ZERO
            for j in range(nx):
                d = ur[j] - vr[j]
                s0 += (yr[j] - ur[j]) * d
                s1 += ur[j] * ur[j]
                s2 += d * d
            acc[0] += s0
            acc[1] += s1
            acc[2] += s2
        partial[z, :] = acc


@_jit_sum
def fista_products_tv(y, u, v, wz, partial, lo, hi):
    """partial[z] = (⟨y − u, u − v⟩, ‖u‖², ‖u − v‖², Σu, Σ|∇u|), the last over the grown
    grid (the TV of u)."""
    nz, ny, nx = y.shape
    zero_row = np.zeros(nx, np.float32)
    for z in range(lo, hi):
        acc = np.zeros(5)
        w_ahead = wz if z + 1 < nz else _ZERO  # Neumann: no depth step after the last plane
        za = z + 1 if z + 1 < nz else z
        for i in range(ny):
            yr, ur, vr, ar = y[z, i], u[z, i], v[z, i], u[za, i]
            dr = u[z, i + 1] if i + 1 < ny else zero_row
            s0 = s1 = s2 = s3 = s4 = _ZERO
            for j in range(nx):
                d = ur[j] - vr[j]
                s0 += (yr[j] - ur[j]) * d
                s1 += ur[j] * ur[j]
                s2 += d * d
                s3 += ur[j]
            for j in range(nx - 1):
                g0 = dr[j] - ur[j]
                g1 = ur[j + 1] - ur[j]
                g2 = w_ahead * (ar[j] - ur[j])
                s4 += np.sqrt(g0 * g0 + g1 * g1 + g2 * g2)
            j = nx - 1  # the step out of the field at the last column, then the zero column
            g0 = dr[j] - ur[j]
            g2 = w_ahead * (ar[j] - ur[j])
            s4 += np.sqrt(g0 * g0 + ur[j] * ur[j] + g2 * g2) + abs(ur[0])
            acc[0] += s0
            acc[1] += s1
            acc[2] += s2
            acc[3] += s3
            acc[4] += s4
        s5 = _ZERO  # the zero row below the field: steps into row 0
        first = u[z, 0]
        for j in range(nx):
            s5 += abs(first[j])
        acc[4] += s5
        partial[z, :] = acc


@_jit
def fista_momentum(y, u, v, beta, lo, hi):
    """y ← u + β(u − v)."""
    _, ny, nx = y.shape
    for z in range(lo, hi):
        for i in range(ny):
            yr, ur, vr = y[z, i], u[z, i], v[z, i]
            for j in range(nx):
                yr[j] = ur[j] + beta * (ur[j] - vr[j])


# ------------------------------------------------------------------------- Richardson–Lucy
@_jit_sum
def rl_update(v, c, den, partial, lo, hi):
    """c ← v · (c / den); partial[z] = (‖c − v‖², ‖c‖²) of the new c."""
    _, ny, nx = v.shape
    for z in range(lo, hi):
        acc = np.zeros(2)
        for i in range(ny):
            vr, cr, dr = v[z, i], c[z, i], den[z, i]
            s0 = s1 = _ZERO
            for j in range(nx):
                u = vr[j] * (cr[j] / dr[j])
                cr[j] = u
                d = u - vr[j]
                s0 += d * d
                s1 += u * u
            acc[0] += s0
            acc[1] += s1
        partial[z, :] = acc


@_jit
def _padded_row(v, z, i, out):
    """Row i of plane z of v grown by one zero row and column (length X + 1)."""
    _, ny, nx = v.shape
    if i < ny:
        row = v[z, i]
        for j in range(nx):
            out[j] = row[j]
    else:
        out[:nx] = _ZERO
    out[nx] = _ZERO


@_jit
def _grown_gradient_rows(v, z, i, wz, here, down, ahead, g0, g1, g2):
    """The three gradient components on row (z, i) of the grown grid (0 ≤ i ≤ Y) into g0, g1,
    g2 (length X + 1); here, down, ahead are scratch rows."""
    nz, ny, nx = v.shape
    _padded_row(v, z, i, here)
    _padded_row(v, z, i + 1 if i < ny else 0, down)
    for j in range(nx + 1):
        g0[j] = down[j] - here[j]
    for j in range(nx):
        g1[j] = here[j + 1] - here[j]
    g1[nx] = here[0] - here[nx]
    if z + 1 < nz:
        _padded_row(v, z + 1, i, ahead)
        for j in range(nx + 1):
            g2[j] = wz * (ahead[j] - here[j])
    else:
        g2[:] = _ZERO


@_jit
def gradient_norm_max(v, wz, partial, lo, hi):
    """partial[z] = max over plane z of the grown grid of |∇v|."""
    nx = v.shape[2]
    rows = np.empty((6, nx + 1), np.float32)
    lane = np.empty(nx + 1, np.float32)  # per-column maxima: an element-wise max vectorises
    for z in range(lo, hi):
        lane[:] = _ZERO
        for i in range(v.shape[1] + 1):
            _grown_gradient_rows(v, z, i, wz, rows[0], rows[1], rows[2], rows[3], rows[4],
                                 rows[5])
            for j in range(nx + 1):
                n = np.sqrt(rows[3, j] * rows[3, j] + rows[4, j] * rows[4, j]
                            + rows[5, j] * rows[5, j])
                lane[j] = max(lane[j], n)
        peak = _ZERO
        for j in range(nx + 1):
            peak = max(peak, lane[j])
        partial[z, 0] = peak


@_jit
def _normalised_rows(v, z, i, wz, eps, scratch, g):
    """∇v / max(|∇v|, eps) on row (z, i) of the grown grid into g (3, X + 1)."""
    nx = v.shape[2]
    _grown_gradient_rows(v, z, i, wz, scratch[0], scratch[1], scratch[2], g[0], g[1], g[2])
    for j in range(nx + 1):
        n = np.sqrt(g[0, j] * g[0, j] + g[1, j] * g[1, j] + g[2, j] * g[2, j])
        f = _ONE / max(n, eps)
        g[0, j] *= f
        g[1, j] *= f
        g[2, j] *= f


@_jit_sum
def rl_tv_update(v, c, sensitivity, l1, tv, floor, eps, wz, partial, lo, hi):
    """c ← v · c / max(sensitivity + l1 + tv·∇ᵀ(∇v / max(|∇v|, eps)), floor);
    partial[z] = (‖c − v‖², ‖c‖²) of the new c."""
    _, ny, nx = v.shape
    scratch = np.empty((3, nx + 1), np.float32)
    here = np.empty((3, nx + 1), np.float32)
    up = np.empty((3, nx + 1), np.float32)
    # Depth components of the normalised gradient on plane z − 1, row by row: each row is
    # normalised once (plane lo − 1 once more, by the thread that starts at lo).
    below = np.zeros((ny, nx + 1), np.float32)
    div = np.empty(nx, np.float32)
    if lo > 0:
        for i in range(ny):
            _normalised_rows(v, lo - 1, i, wz, eps, scratch, here)
            below[i, :] = here[2]
    for z in range(lo, hi):
        acc = np.zeros(2)
        _normalised_rows(v, z, ny, wz, eps, scratch, up)  # the zero row above row 0 (periodic)
        for i in range(ny):
            _normalised_rows(v, z, i, wz, eps, scratch, here)
            vr, cr, sr = v[z, i], c[z, i], sensitivity[z, i]
            h0, h1, h2, u0, b2 = here[0], here[1], here[2], up[0], below[i]
            # ∇ᵀp = p_y[i−1] − p_y[i] + p_x[j−1] − p_x[j] + w_z (p_z[z−1] − p_z[z])
            div[0] = h1[nx]
            for j in range(1, nx):
                div[j] = h1[j - 1]
            for j in range(nx):
                div[j] += u0[j] - h0[j] - h1[j] + wz * (b2[j] - h2[j])
            s0 = s1 = _ZERO
            for j in range(nx):
                den = max(sr[j] + l1 + tv * div[j], floor)
                u = vr[j] * (cr[j] / den)
                cr[j] = u
                d = u - vr[j]
                s0 += d * d
                s1 += u * u
            up[0, :] = h0
            b2[:] = h2  # plane z's row for plane z + 1
            acc[0] += s0
            acc[1] += s1
        partial[z, :] = acc


# ---------------------------------------------------------------------------- TV prox (FGP)
@_jit
def _primal_plane(z_in, r, z, weight, wz, nonnegative, out):
    """Plane z of P(z_in − weight·∇ᵀr) on the field (Y, X) into out (≥ Y, ≥ X)."""
    nz, ny, nx = z_in.shape
    # ∇ᵀr = r_y[i−1] − r_y[i] + r_x[j−1] − r_x[j] + w_z (r_z[z−1] − r_z[z]), r_z[−1] = 0 and
    # the last plane of r_z unused: the ends enter as weights 0 (no branches in the rows).
    w_below = wz if z > 0 else _ZERO
    w_here = wz if z + 1 < nz else _ZERO
    zb = z - 1 if z > 0 else z
    for i in range(ny):
        r0, r0_up, r1 = r[0, z, i], r[0, z, i - 1 if i > 0 else ny], r[1, z, i]
        r2, r2_below = r[2, z, i], r[2, zb, i]
        zr, ur = z_in[z, i], out[i]
        d = (r0_up[0] - r0[0] + r1[nx] - r1[0] + w_below * r2_below[0] - w_here * r2[0])
        u = zr[0] - weight * d
        ur[0] = max(u, _ZERO) if nonnegative else u
        if nonnegative:
            for j in range(1, nx):
                d = (r0_up[j] - r0[j] + r1[j - 1] - r1[j] + w_below * r2_below[j]
                     - w_here * r2[j])
                ur[j] = max(zr[j] - weight * d, _ZERO)
        else:
            for j in range(1, nx):
                d = (r0_up[j] - r0[j] + r1[j - 1] - r1[j] + w_below * r2_below[j]
                     - w_here * r2[j])
                ur[j] = zr[j] - weight * d


@_jit
def _dual_point(r0, r1, r2, p0, p1, p2, j, a, b, c, beta):
    """q = (a, b, c) / max(|(a, b, c)|, 1), r ← q + β(q − p), p ← q at column j."""
    f = _ONE / np.sqrt(max(a * a + b * b + c * c, _ONE))
    a *= f
    b *= f
    c *= f
    r0[j] = a + beta * (a - p0[j])
    r1[j] = b + beta * (b - p1[j])
    r2[j] = c + beta * (c - p2[j])
    p0[j] = a
    p1[j] = b
    p2[j] = c


@_jit
def _dual_plane(here, ahead, has_ahead, p, r, z, step, beta, wz):
    """Plane z of q = Π_{|·|≤1}(r + step·∇u), r ← q + β(q − p), p ← q, in place; here and
    ahead are planes z and z + 1 of u (Y+1, X+1), zero outside the field."""
    n0, n1 = here.shape
    sz = step * wz if has_ahead else _ZERO  # Neumann: no depth step after the last plane
    for i in range(n0):
        row, down, nxt = here[i], here[i + 1 if i + 1 < n0 else 0], ahead[i]
        r0, r1, r2 = r[0, z, i], r[1, z, i], r[2, z, i]
        p0, p1, p2 = p[0, z, i], p[1, z, i], p[2, z, i]
        for j in range(n1 - 1):
            _dual_point(r0, r1, r2, p0, p1, p2, j, r0[j] + step * (down[j] - row[j]),
                        r1[j] + step * (row[j + 1] - row[j]),
                        r2[j] + sz * (nxt[j] - row[j]), beta)
        j = n1 - 1  # the x difference wraps around at the last column
        _dual_point(r0, r1, r2, p0, p1, p2, j, r0[j] + step * (down[j] - row[j]),
                    r1[j] + step * (row[0] - row[j]), r2[j] + sz * (nxt[j] - row[j]), beta)


@_jit
def tv_primal(z_in, r, weight, wz, nonnegative, u, lo, hi):
    """u ← P(z_in − weight·∇ᵀr) on the field (Y, X) of u; the rest of u is left alone.

    z_in (Z, Y, X); r (3, Z, Y+1, X+1); u (Z, ≥Y, ≥X). P clips at 0 with `nonnegative`."""
    for z in range(lo, hi):
        _primal_plane(z_in, r, z, weight, wz, nonnegative, u[z])


@_jit
def tv_primal_starts(z_in, r, bounds, weight, wz, nonnegative, starts):
    """starts[k] ← plane bounds[k] of P(z_in − weight·∇ᵀr), for each range of a split."""
    for k in range(bounds.size - 1):
        _primal_plane(z_in, r, bounds[k], weight, wz, nonnegative, starts[k])


@_jit
def tv_sweep(z_in, p, r, starts, bounds, weight, step, beta, wz, nonnegative, lo, hi):
    """One step of the TV dual iteration on planes [lo, hi) (a range of `bounds`), in place:

    u = P(z_in − weight·∇ᵀr), q = Π_{|·|≤1}(r + step·∇u), r ← q + β(q − p), p ← q.

    u is made plane by plane just ahead of the dual step that needs it and never stored
    whole: the planes of u, r and p in use stay in the cache. The dual step of plane z
    changes r on plane z, which planes z and z + 1 of u read, so plane z + 1 of u is made
    before it; the planes at the ends of the range come from `starts` (made before any range
    ran, from the r all ranges start with)."""
    nz, ny, nx = z_in.shape
    k = 0
    while bounds[k] != lo:
        k += 1
    work = np.zeros((2, ny + 1, nx + 1), np.float32)
    here = work[0]
    here[:, :] = starts[k]
    for z in range(lo, hi):
        has_ahead = z + 1 < nz
        if not has_ahead:
            ahead = here
        elif z + 1 == hi:
            ahead = starts[k + 1]
        else:
            ahead = work[(z - lo + 1) % 2]
            _primal_plane(z_in, r, z + 1, weight, wz, nonnegative, ahead)
        _dual_plane(here, ahead, has_ahead, p, r, z, step, beta, wz)
        here = ahead
