"""numba kernels behind :class:`volrecon.solvers.admm_steps.CompiledSteps`.

Each kernel works on the planes (or frequency rows) ``[lo, hi)`` so that the caller can split
one step over threads; all release the GIL. Conventions as in :mod:`volrecon.solvers.tv`:
gradient components (y, x, z), periodic lateral differences, Neumann depth ends, depth steps
weighted by ``wz``. Compiled on first use and cached next to this file.
"""

from __future__ import annotations

import numba
import numpy as np

# No nnan/ninf (a diverging frame must stay visible as NaN/Inf) and no reassociation in the
# update kernels; "arcp"/"contract"/"afn"/"nsz" and float32 constants let LLVM vectorise the
# rows (measured 8× over a scalar loop with float64 promotion on a 16×256² TV step).
_FAST = {"arcp", "contract", "afn", "nsz"}
_jit = numba.njit(nogil=True, cache=True, error_model="numpy", fastmath=_FAST)
# Norms for the stopping rule only: reassociation lets the row sums vectorise; each plane's sum
# is still computed in one fixed order, whatever the thread split.
_jit_sum = numba.njit(nogil=True, cache=True, error_model="numpy", fastmath=_FAST | {"reassoc"})
_ZERO = np.float32(0.0)
_ONE = np.float32(1.0)
_TWO = np.float32(2.0)


@_jit
def _gradient_rows(v, z, i, wz, g0, g1, g2):
    """The three gradient components of row (z, i) into g0, g1, g2."""
    nz, ny, nx = v.shape
    row = v[z, i]
    down = v[z, i + 1 if i + 1 < ny else 0]
    for j in range(nx):
        g0[j] = down[j] - row[j]
    for j in range(nx - 1):
        g1[j] = row[j + 1] - row[j]
    g1[nx - 1] = row[0] - row[nx - 1]
    if z + 1 < nz:
        nxt = v[z + 1, i]
        for j in range(nx):
            g2[j] = wz * (nxt[j] - row[j])
    else:
        g2[:] = _ZERO


@_jit
def tv_dual(v, ymb, y_out, save, kappa, rho, wz, lo, hi):
    _, ny, nx = v.shape
    g = np.empty((3, nx), np.float32)
    y = np.empty((3, nx), np.float32)
    for z in range(lo, hi):
        for i in range(ny):
            _gradient_rows(v, z, i, wz, g[0], g[1], g[2])
            m0, m1, m2 = ymb[0, z, i], ymb[1, z, i], ymb[2, z, i]
            for j in range(nx):
                u0 = _TWO * g[0, j] - m0[j]
                u1 = _TWO * g[1, j] - m1[j]
                u2 = _TWO * g[2, j] - m2[j]
                norm = np.sqrt(u0 * u0 + u1 * u1 + u2 * u2)
                f = rho * max(_ONE - kappa / max(norm, kappa), _ZERO)
                y[0, j] = f * u0
                y[1, j] = f * u1
                y[2, j] = f * u2
            # branches stay out of the element loops: they would stop vectorisation (4×)
            for c in range(3):
                m = ymb[c, z, i]
                for j in range(nx):
                    m[j] += y[c, j] - rho * g[c, j]
            if save:
                for c in range(3):
                    yo = y_out[c, z, i]
                    for j in range(nx):
                        yo[j] = y[c, j]


@_jit
def _adjoint_row(p, z, i, wz, out):
    """Row (z, i) of ∇ᵀp into out."""
    nz, ny, nx = p.shape[1:]
    p0, p0_up = p[0, z, i], p[0, z, i - 1 if i > 0 else ny - 1]
    p1 = p[1, z, i]
    for j in range(nx):
        out[j] = p0_up[j] - p0[j] - p1[j]
    out[0] += p1[nx - 1]
    for j in range(1, nx):
        out[j] += p1[j - 1]
    if z > 0:
        prev = p[2, z - 1, i]
        for j in range(nx):
            out[j] += wz * prev[j]
    if z + 1 < nz:
        here = p[2, z, i]
        for j in range(nx):
            out[j] -= wz * here[j]


@_jit
def w_update(v, wmg, rhs, ymb, use_tv, w_out, save, compare, change, thresh, rho, mu2, mu3,
             wz, sy, sx, lo, hi):
    _, ny, nx = v.shape
    div = np.empty(nx, np.float32)
    w = np.zeros(nx, np.float32)
    # Per-column partial sums of the comparison: an element-wise accumulation vectorises,
    # a running scalar sum without reassociation does not (4× on the whole step).
    lane_change = np.empty(nx, np.float32)
    lane_norm = np.empty(nx, np.float32)
    keep = _ONE - rho
    for z in range(lo, hi):
        lane_change[:] = _ZERO
        lane_norm[:] = _ZERO
        for i in range(ny):
            vr, mr = v[z, i], wmg[z, i]
            width = sx if i < sy else 0
            for j in range(width):
                w[j] = max(_TWO * vr[j] - mr[j] - thresh, _ZERO)  # v + γ − thresh, γ = v − wmg
            for j in range(width, sx):
                w[j] = _ZERO
            for j in range(nx):
                mr[j] = keep * vr[j] - (vr[j] - mr[j]) + rho * w[j]
            if save:
                wo = w_out[z, i]
                if compare:  # Σ(w − previous w)² and Σw², then overwrite
                    for j in range(nx):
                        d = w[j] - wo[j]
                        lane_change[j] += d * d
                        lane_norm[j] += w[j] * w[j]
                for j in range(nx):
                    wo[j] = w[j]
            if use_tv:
                _adjoint_row(ymb, z, i, wz, div)
                rr = rhs[z, i]
                for j in range(nx):
                    rr[j] = mu3 * mr[j] + mu2 * div[j]
        if save and compare:
            s = 0.0
            q = 0.0
            for j in range(nx):
                s += lane_change[j]
                q += lane_norm[j]
            change[z, 0] += s
            change[z, 1] += q


@_jit_sum
def w_norms(v, w, wmg, partial, lo, hi):
    _, ny, nx = v.shape
    for z in range(lo, hi):
        acc = np.zeros(4)
        for i in range(ny):
            s0 = s1 = s2 = s3 = _ZERO
            vr, wr, mr = v[z, i], w[z, i], wmg[z, i]
            for j in range(nx):
                c, b = vr[j], wr[j]
                g = c - mr[j]
                s0 += (c - b) * (c - b)
                s1 += c * c
                s2 += b * b
                s3 += g * g
            acc[0] += s0
            acc[1] += s1
            acc[2] += s2
            acc[3] += s3
        partial[z, :] = acc


@_jit
def _beta_and_change_rows(v, y, y_prev, ymb, z, i, wz, inv_rho, g, b, d):
    """Row (z, i) of ∇v into g, of β = ∇v − ymb into b and of (y − y_prev)/ρ into d."""
    _gradient_rows(v, z, i, wz, g[0], g[1], g[2])
    for c in range(3):
        gr, mr, yr, pr, br, dr = g[c], ymb[c, z, i], y[c, z, i], y_prev[c, z, i], b[c], d[c]
        for j in range(gr.size):
            br[j] = gr[j] - mr[j]
            dr[j] = (yr[j] - pr[j]) * inv_rho


@_jit_sum
def tv_norms(v, y, y_prev, ymb, wz, inv_rho, partial, lo, hi):
    nz, ny, nx = v.shape
    g = np.empty((3, nx), np.float32)
    b = np.empty((3, nx), np.float32)
    d = np.empty((3, nx), np.float32)
    b_up = np.empty(nx, np.float32)  # first components of β and d on the row above
    d_up = np.empty(nx, np.float32)
    b_below = np.empty(nx, np.float32)  # depth components of β and d on plane z − 1
    d_below = np.empty(nx, np.float32)
    for z in range(lo, hi):
        acc = np.zeros(5)
        _beta_and_change_rows(v, y, y_prev, ymb, z, ny - 1, wz, inv_rho, g, b, d)
        b_up[:] = b[0]
        d_up[:] = d[0]
        top = _ONE if z + 1 < nz else _ZERO
        for i in range(ny):
            _beta_and_change_rows(v, y, y_prev, ymb, z, i, wz, inv_rho, g, b, d)
            s0 = s1 = s2 = s3 = s4 = _ZERO
            for c in range(3):
                gr, yr = g[c], y[c, z, i]
                for j in range(nx):
                    yc = yr[j] * inv_rho
                    s0 += (gr[j] - yc) * (gr[j] - yc)
                    s1 += gr[j] * gr[j]
                    s2 += yc * yc
            if z > 0:
                for j in range(nx):
                    b_below[j] = wz * (v[z, i, j] - v[z - 1, i, j]) - ymb[2, z - 1, i, j]
                    d_below[j] = (y[2, z - 1, i, j] - y_prev[2, z - 1, i, j]) * inv_rho
            else:
                b_below[:] = _ZERO
                d_below[:] = _ZERO
            # ∇ᵀ of d and of β on this row (the stencil of _adjoint_row)
            d0, d1, d2, b0, b1, b2 = d[0], d[1], d[2], b[0], b[1], b[2]
            dd = d_up[0] - d0[0] + d1[nx - 1] - d1[0] + wz * (d_below[0] - top * d2[0])
            db = b_up[0] - b0[0] + b1[nx - 1] - b1[0] + wz * (b_below[0] - top * b2[0])
            s3 += dd * dd
            s4 += db * db
            for j in range(1, nx):  # no wrap-around inside the loop: it vectorises
                dd = d_up[j] - d0[j] + d1[j - 1] - d1[j] + wz * (d_below[j] - top * d2[j])
                db = b_up[j] - b0[j] + b1[j - 1] - b1[j] + wz * (b_below[j] - top * b2[j])
                s3 += dd * dd
                s4 += db * db
            b_up[:] = b[0]
            d_up[:] = d[0]
            acc[0] += s0
            acc[1] += s1
            acc[2] += s2
            acc[3] += s3
            acc[4] += s4
        partial[z, :] = acc


@_jit
def gradient_minus(v, p, wz, lo, hi):
    """p ← ∇v − p on planes [lo, hi): ymb from β, and β from ymb."""
    _, ny, nx = v.shape
    g = np.empty((3, nx), np.float32)
    for z in range(lo, hi):
        for i in range(ny):
            _gradient_rows(v, z, i, wz, g[0], g[1], g[2])
            for c in range(3):
                pr = p[c, z, i]
                for j in range(nx):
                    pr[j] = g[c, j] - pr[j]


@_jit
def volume_factors(h, lateral, use_lateral, mu1, mu2, mu3, e, inv, p, g, qg, lo, hi):
    """The data-independent part of the volume solve (``ArraySteps.volume_solve``) on rows
    [lo, hi): the Thomas pivots' inverses ``inv`` (Z, Py, F), ``p = T⁻¹a`` (Z, Py, 2F),
    ``g = 1/(1 + μ₁aᴴp)`` and ``qg = aᴴp·g`` (Py, F); h and p are float32 views of complex64
    spectra, a = conj(h)."""
    nz, _, nf2 = h.shape
    nf = nf2 // 2
    base = np.empty(nf, np.float32)
    q = np.empty(nf, np.float32)
    for i in range(lo, hi):
        for j in range(nf):
            base[j] = mu2 * lateral[i, j] + mu3 if use_lateral else mu3
        for k in range(nz):
            nk = _ZERO if nz == 1 else (_ONE if k == 0 or k == nz - 1 else _TWO)
            hk, pk, ik = h[k, i], p[k, i], inv[k, i]
            if k == 0:
                for j in range(nf):
                    d = _ONE / (base[j] + e * nk)
                    ik[j] = d
                    pk[2 * j] = hk[2 * j] * d
                    pk[2 * j + 1] = -hk[2 * j + 1] * d
            else:
                pp, ip = p[k - 1, i], inv[k - 1, i]
                for j in range(nf):
                    d = _ONE / (base[j] + e * nk - e * e * ip[j])
                    ik[j] = d
                    pk[2 * j] = (hk[2 * j] + e * pp[2 * j]) * d
                    pk[2 * j + 1] = (-hk[2 * j + 1] + e * pp[2 * j + 1]) * d
        for k in range(nz - 2, -1, -1):
            pk, pn, ik = p[k, i], p[k + 1, i], inv[k, i]
            for j in range(nf):
                c = e * ik[j]
                pk[2 * j] += c * pn[2 * j]
                pk[2 * j + 1] += c * pn[2 * j + 1]
        q[:] = _ZERO
        for k in range(nz):
            hk, pk = h[k, i], p[k, i]
            for j in range(nf):
                q[j] += hk[2 * j] * pk[2 * j] - hk[2 * j + 1] * pk[2 * j + 1]
        gr, qr = g[i], qg[i]
        for j in range(nf):
            gj = _ONE / (_ONE + mu1 * q[j])
            gr[j] = gj
            qr[j] = q[j] * gj


@_jit
def volume_apply(r, p, inv, g, qg, xh, scale, mu1, e, mv, lo, hi):
    """The volume solve from the factors of :func:`volume_factors`, in place in r.

    With t = T⁻¹r (one Thomas sweep on the data) and s = pᴴr (= aᴴT⁻¹r, T symmetric):
    ``(M v)^ = g·scale·s + qg·x̂`` and ``ṽ = scale·t + (x̂ − μ₁(M v)^)·p``."""
    nz, _, nf2 = r.shape
    nf = nf2 // 2
    sr = np.empty(nf, np.float32)
    si = np.empty(nf, np.float32)
    cr = np.empty(nf, np.float32)
    ci = np.empty(nf, np.float32)
    for i in range(lo, hi):
        sr[:] = _ZERO
        si[:] = _ZERO
        for k in range(nz):
            rk, pk, ik = r[k, i], p[k, i], inv[k, i]
            for j in range(nf):  # s += conj(p)·r, before r becomes t
                sr[j] += pk[2 * j] * rk[2 * j] + pk[2 * j + 1] * rk[2 * j + 1]
                si[j] += pk[2 * j] * rk[2 * j + 1] - pk[2 * j + 1] * rk[2 * j]
            if k == 0:
                for j in range(nf):
                    rk[2 * j] *= ik[j]
                    rk[2 * j + 1] *= ik[j]
            else:
                rp = r[k - 1, i]
                for j in range(nf):
                    rk[2 * j] = (rk[2 * j] + e * rp[2 * j]) * ik[j]
                    rk[2 * j + 1] = (rk[2 * j + 1] + e * rp[2 * j + 1]) * ik[j]
        for k in range(nz - 2, -1, -1):
            rk, rn, ik = r[k, i], r[k + 1, i], inv[k, i]
            for j in range(nf):
                c = e * ik[j]
                rk[2 * j] += c * rn[2 * j]
                rk[2 * j + 1] += c * rn[2 * j + 1]
        xr, gr, qr, mvr = xh[i], g[i], qg[i], mv[i]
        for j in range(nf):
            mre = scale * gr[j] * sr[j] + qr[j] * xr[2 * j]
            mim = scale * gr[j] * si[j] + qr[j] * xr[2 * j + 1]
            mvr[2 * j] = mre
            mvr[2 * j + 1] = mim
            cr[j] = xr[2 * j] - mu1 * mre
            ci[j] = xr[2 * j + 1] - mu1 * mim
        for k in range(nz):
            rk, pk = r[k, i], p[k, i]
            for j in range(nf):
                pre, pim = pk[2 * j], pk[2 * j + 1]
                rk[2 * j] = scale * rk[2 * j] + cr[j] * pre - ci[j] * pim
                rk[2 * j + 1] = scale * rk[2 * j + 1] + cr[j] * pim + ci[j] * pre


@_jit
def volume_apply_diagonal(r, h, gain, xh, scale, mu1, mu3, mv, lo, hi):
    """The volume solve without TV (T = μ₃I), in place in r: with q = Σ|h|²/μ₃
    (`gain` = Σ|h|²), ``(M v)^ = (scale·Σ h·r/μ₃ + q·x̂) / (1 + μ₁q)`` and
    ``ṽ = (scale·r + (x̂ − μ₁(M v)^)·conj(h)) / μ₃``."""
    nz, _, nf2 = r.shape
    nf = nf2 // 2
    inv = _ONE / mu3
    sr = np.empty(nf, np.float32)
    si = np.empty(nf, np.float32)
    for i in range(lo, hi):
        sr[:] = _ZERO
        si[:] = _ZERO
        for k in range(nz):
            rk, hk = r[k, i], h[k, i]
            for j in range(nf):  # s += h·r = aᴴr
                sr[j] += hk[2 * j] * rk[2 * j] - hk[2 * j + 1] * rk[2 * j + 1]
                si[j] += hk[2 * j] * rk[2 * j + 1] + hk[2 * j + 1] * rk[2 * j]
        xr, gn, mvr = xh[i], gain[i], mv[i]
        for j in range(nf):
            q = gn[j] * inv
            gj = _ONE / (_ONE + mu1 * q)
            mre = (scale * inv * sr[j] + q * xr[2 * j]) * gj
            mim = (scale * inv * si[j] + q * xr[2 * j + 1]) * gj
            mvr[2 * j] = mre
            mvr[2 * j + 1] = mim
            sr[j] = (xr[2 * j] - mu1 * mre) * inv  # now the coefficient of conj(h)
            si[j] = (xr[2 * j + 1] - mu1 * mim) * inv
        for k in range(nz):
            rk, hk = r[k, i], h[k, i]
            for j in range(nf):
                hre, him = hk[2 * j], hk[2 * j + 1]
                rk[2 * j] = scale * inv * rk[2 * j] + sr[j] * hre + si[j] * him
                rk[2 * j + 1] = scale * inv * rk[2 * j + 1] + si[j] * hre - sr[j] * him


@_jit
def window_transform(a, out, c, lo, hi):
    """``out[k] = Σ_m c[k, m]·a[m]`` on rows [lo, hi) of (W, R, X) arrays: a W×W transform
    along the window (the DCT-II of the temporal prior), one pass over a row of every frame;
    `out` may be `a`."""
    nw, _, nx = a.shape
    buf = np.empty((nw, nx), np.float32)
    for i in range(lo, hi):
        for k in range(nw):
            b = buf[k]
            ck, src = c[k, 0], a[0, i]
            for j in range(nx):
                b[j] = ck * src[j]
            for m in range(1, nw):
                ck, src = c[k, m], a[m, i]
                for j in range(nx):
                    b[j] += ck * src[j]
        for k in range(nw):
            dst, b = out[k, i], buf[k]
            for j in range(nx):
                dst[j] = b[j]



@_jit
def window_transform8(a, out, c, lo, hi):
    """:func:`window_transform` for a window of 8 frames, the matrix held in registers: each
    element is read once and written once (the general kernel reads and writes a row buffer
    per product: ~1.8× the time). This row of the 8 frames is copied first, so `out` may be
    `a` (an aliased row would stop the vectorisation); each sum runs in the order m = 0..7."""
    _, _, nx = a.shape
    buf = np.empty((8, nx), np.float32)
    c00, c01, c02, c03 = c[0, 0], c[0, 1], c[0, 2], c[0, 3]
    c04, c05, c06, c07 = c[0, 4], c[0, 5], c[0, 6], c[0, 7]
    c10, c11, c12, c13 = c[1, 0], c[1, 1], c[1, 2], c[1, 3]
    c14, c15, c16, c17 = c[1, 4], c[1, 5], c[1, 6], c[1, 7]
    c20, c21, c22, c23 = c[2, 0], c[2, 1], c[2, 2], c[2, 3]
    c24, c25, c26, c27 = c[2, 4], c[2, 5], c[2, 6], c[2, 7]
    c30, c31, c32, c33 = c[3, 0], c[3, 1], c[3, 2], c[3, 3]
    c34, c35, c36, c37 = c[3, 4], c[3, 5], c[3, 6], c[3, 7]
    c40, c41, c42, c43 = c[4, 0], c[4, 1], c[4, 2], c[4, 3]
    c44, c45, c46, c47 = c[4, 4], c[4, 5], c[4, 6], c[4, 7]
    c50, c51, c52, c53 = c[5, 0], c[5, 1], c[5, 2], c[5, 3]
    c54, c55, c56, c57 = c[5, 4], c[5, 5], c[5, 6], c[5, 7]
    c60, c61, c62, c63 = c[6, 0], c[6, 1], c[6, 2], c[6, 3]
    c64, c65, c66, c67 = c[6, 4], c[6, 5], c[6, 6], c[6, 7]
    c70, c71, c72, c73 = c[7, 0], c[7, 1], c[7, 2], c[7, 3]
    c74, c75, c76, c77 = c[7, 4], c[7, 5], c[7, 6], c[7, 7]
    a0, a1, a2, a3, a4, a5, a6, a7 = buf[0], buf[1], buf[2], buf[3], buf[4], buf[5], buf[6], buf[7]
    for i in range(lo, hi):
        for m in range(8):
            bm, am = buf[m], a[m, i]
            for j in range(nx):
                bm[j] = am[j]
        o0, o1, o2, o3 = out[0, i], out[1, i], out[2, i], out[3, i]
        o4, o5, o6, o7 = out[4, i], out[5, i], out[6, i], out[7, i]
        for j in range(nx):
            x0, x1, x2, x3, x4, x5, x6, x7 = a0[j], a1[j], a2[j], a3[j], a4[j], a5[j], a6[j], a7[j]
            y0 = (c00 * x0 + c01 * x1 + c02 * x2 + c03 * x3 + c04 * x4 + c05 * x5
                  + c06 * x6 + c07 * x7)
            y1 = (c10 * x0 + c11 * x1 + c12 * x2 + c13 * x3 + c14 * x4 + c15 * x5
                  + c16 * x6 + c17 * x7)
            y2 = (c20 * x0 + c21 * x1 + c22 * x2 + c23 * x3 + c24 * x4 + c25 * x5
                  + c26 * x6 + c27 * x7)
            y3 = (c30 * x0 + c31 * x1 + c32 * x2 + c33 * x3 + c34 * x4 + c35 * x5
                  + c36 * x6 + c37 * x7)
            y4 = (c40 * x0 + c41 * x1 + c42 * x2 + c43 * x3 + c44 * x4 + c45 * x5
                  + c46 * x6 + c47 * x7)
            y5 = (c50 * x0 + c51 * x1 + c52 * x2 + c53 * x3 + c54 * x4 + c55 * x5
                  + c56 * x6 + c57 * x7)
            y6 = (c60 * x0 + c61 * x1 + c62 * x2 + c63 * x3 + c64 * x4 + c65 * x5
                  + c66 * x6 + c67 * x7)
            y7 = (c70 * x0 + c71 * x1 + c72 * x2 + c73 * x3 + c74 * x4 + c75 * x5
                  + c76 * x6 + c77 * x7)
            o0[j] = y0
            o1[j] = y1
            o2[j] = y2
            o3[j] = y3
            o4[j] = y4
            o5[j] = y5
            o6[j] = y6
            o7[j] = y7
