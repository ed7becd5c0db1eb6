"""The solvers' problems written out independently of volrecon, for the solver tests.

The forward operator is an explicit sparse matrix built by index arithmetic, TV is a stack of
sparse difference matrices, and the optima come from cvxpy (Clarabel interior point). Nothing
here imports volrecon.
"""

from __future__ import annotations

from collections.abc import Callable

import cvxpy as cp
import numpy as np
import scipy.sparse as sp
from scipy.signal import fftconvolve


def dense_operator(psf: np.ndarray) -> sp.csr_matrix:
    """Explicit matrix of Σ_z h_z ⊛ v_z with the centre convention, built by index arithmetic
    (independent of the FFT code under test)."""
    nz, ny, nx = psf.shape
    cy, cx = ny // 2, nx // 2
    rows, cols, vals = [], [], []
    for z in range(nz):
        for yp in range(ny):
            for xp in range(nx):
                col = (z * ny + yp) * nx + xp
                for y in range(ny):
                    ky = y - yp + cy
                    if not 0 <= ky < ny:
                        continue
                    for x in range(nx):
                        kx = x - xp + cx
                        if 0 <= kx < nx and psf[z, ky, kx] != 0:
                            rows.append(y * nx + x)
                            cols.append(col)
                            vals.append(psf[z, ky, kx])
    return sp.csr_matrix((vals, (rows, cols)), shape=(ny * nx, nz * ny * nx))


def tv_operators(nz: int, ny: int, nx: int, z_weight: float) -> list[sp.csr_matrix]:
    """Sparse forward differences of the TV definition: zero-extended by one pixel laterally
    with periodic wrap (Dirichlet ends), Neumann along depth; as documented in solvers.tv."""

    def periodic(n):
        return sp.diags([-np.ones(n), np.ones(n - 1)], [0, 1], shape=(n, n)).tolil()

    py, px = ny + 1, nx + 1
    dy = periodic(py)
    dy[py - 1, 0] = 1
    dx = periodic(px)
    dx[px - 1, 0] = 1
    dz = sp.diags([-np.ones(nz), np.ones(nz - 1)], [0, 1], shape=(nz, nz)).tolil()
    dz[nz - 1, nz - 1] = 0
    eye = sp.identity
    d_y = sp.kron(sp.kron(eye(nz), dy.tocsr()), eye(px))
    d_x = sp.kron(sp.kron(eye(nz), eye(py)), dx.tocsr())
    d_z = z_weight * sp.kron(sp.kron(dz.tocsr(), eye(py)), eye(px))
    # embedding of the field into the padded grid
    keep = np.zeros((nz, py, px), bool)
    keep[:, :ny, :nx] = True
    embed = sp.identity(nz * py * px, format="csr")[:, keep.ravel()]
    return [(d @ embed).tocsr() for d in (d_y, d_x, d_z)]


def textbook_tv(volume: np.ndarray, z_weight: float) -> float:
    """Σ sqrt((Dy v)² + (Dx v)² + (w_z Dz v)²) straight from the definition with numpy: the
    field extended by one zero row and column and wrapped (so the steps into the first and
    out of the last pixel count), depth differences zero on the last plane."""
    nz, ny, nx = volume.shape
    u = np.zeros((nz, ny + 1, nx + 1))
    u[:, :ny, :nx] = volume
    dy = np.roll(u, -1, axis=1) - u
    dx = np.roll(u, -1, axis=2) - u
    dz = np.zeros_like(u)
    dz[:-1] = z_weight * np.diff(u, axis=0)
    return float(np.sqrt(dy**2 + dx**2 + dz**2).sum())


def textbook_forward(volume: np.ndarray, psf: np.ndarray) -> np.ndarray:
    """Σ_z h_z ⊛ v_z by scipy.signal.fftconvolve (linear), cropped at (Y//2, X//2)."""
    _, ny, nx = psf.shape
    planes = zip(np.asarray(volume, np.float64), np.asarray(psf, np.float64), strict=True)
    return sum(fftconvolve(v, h)[ny // 2 : ny // 2 + ny, nx // 2 : nx // 2 + nx]
               for v, h in planes)


def textbook_objective(volume: np.ndarray, frame: np.ndarray, psf: np.ndarray, *, tv: float,
                       l1: float, z_weight: float = 1.0) -> float:
    """½‖Av − b‖² + l1·‖v‖₁ + tv·TV(v), A by fftconvolve, TV by :func:`textbook_tv`."""
    residual = textbook_forward(volume, psf) - np.asarray(frame, np.float64)
    value = 0.5 * float((residual**2).sum())
    value += l1 * float(np.abs(np.asarray(volume, np.float64)).sum())
    return value + tv * textbook_tv(np.asarray(volume, np.float64), z_weight)


def cvxpy_optimum(psf: np.ndarray, frame: np.ndarray, *, tv: float, l1: float,
                  z_weight: float = 1.0
                  ) -> tuple[float, np.ndarray, Callable[[np.ndarray], float]]:
    """min over v ≥ 0 of ½‖Av − b‖² + l1·Σv + tv·Σ|∇v|₂ by cvxpy (Clarabel).

    Returns the optimal value, the minimiser (Z, Y, X) and the same cost as a numpy function
    of any volume (the matrices cvxpy saw), so a solver's result is scored without its own
    objective code.
    """
    nz, ny, nx = psf.shape
    a = dense_operator(psf)
    b = np.asarray(frame, np.float64).ravel()
    d = tv_operators(nz, ny, nx, z_weight) if tv else []
    v = cp.Variable(nz * ny * nx, nonneg=True)
    cost = 0.5 * cp.sum_squares(a @ v - b) + l1 * cp.sum(v)
    if tv:
        cost += tv * cp.sum(cp.norm(cp.vstack([di @ v for di in d]), 2, axis=0))
    problem = cp.Problem(cp.Minimize(cost))
    problem.solve(solver=cp.CLARABEL)

    def evaluate(volume: np.ndarray) -> float:
        x = np.asarray(volume, np.float64).ravel()
        r = a @ x - b
        value = 0.5 * float(r @ r) + l1 * float(x.sum())
        if tv:
            g = np.stack([di @ x for di in d])
            value += tv * float(np.sqrt((g**2).sum(axis=0)).sum())
        return value

    return float(problem.value), v.value.reshape(nz, ny, nx), evaluate


def cvxpy_tv_prox(z: np.ndarray, weight: float, z_weight: float, *, nonnegative: bool
                  ) -> tuple[float, np.ndarray, Callable[[np.ndarray], float]]:
    """argmin_u ½‖u − z‖² + weight·Σ|∇u|₂ (over u ≥ 0 if `nonnegative`) by cvxpy (Clarabel).

    Returns the optimal value, the minimiser and the cost as a numpy function.
    """
    nz, ny, nx = z.shape
    d = tv_operators(nz, ny, nx, z_weight)
    target = np.asarray(z, np.float64).ravel()
    u = cp.Variable(target.size, nonneg=nonnegative)
    cost = 0.5 * cp.sum_squares(u - target)
    cost += weight * cp.sum(cp.norm(cp.vstack([di @ u for di in d]), 2, axis=0))
    problem = cp.Problem(cp.Minimize(cost))
    problem.solve(solver=cp.CLARABEL)

    def evaluate(volume: np.ndarray) -> float:
        x = np.asarray(volume, np.float64).ravel()
        g = np.stack([di @ x for di in d])
        return 0.5 * float(((x - target) ** 2).sum()) + weight * float(
            np.sqrt((g**2).sum(axis=0)).sum())

    return float(problem.value), u.value.reshape(z.shape), evaluate
