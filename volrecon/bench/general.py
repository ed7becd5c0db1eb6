"""volrecon against a general-purpose stack: the same problem in PyLops + PyProximal.

The operator is rebuilt from PyLops parts — one ``Convolve2D`` per depth plane (offset at the
centre, so it is the same linear convolution with the same centre convention) stacked with
``HStack`` — and checked against ``PSFModel.forward`` before timing. The objective is the same:

- l1 case: ``½‖Av − b‖² + l1·Σv`` over ``v ≥ 0``, solved by PyProximal's accelerated proximal
  gradient (FISTA) with the prox of ``l1·‖·‖₁`` followed by the projection on ``v ≥ 0``;
- tv case: ``½‖Av − b‖² + tv·TV(v)`` over ``v ≥ 0``, solved by PyProximal's primal–dual
  (Chambolle–Pock) with ``K = [A; D]``, ``D`` the sparse forward differences of volrecon's TV
  definition wrapped in ``pylops.MatrixMult``, ``g = [½‖· − b‖²; tv·L21]`` and ``f`` the
  projection on ``v ≥ 0``.

The figure is the wall-clock time to reach an objective within 1 % of the optimum (the best
objective any run reached, from a long volrecon solve), for volrecon's fastest method and for
the PyProximal solver; their ratio is printed. Objective evaluations inside the PyProximal
callback are excluded from its clock.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import scipy.sparse as sp

from volrecon.models import PSFModel
from volrecon.solvers import objective, reconstruct
from volrecon.solvers.tv import tv_value

__all__ = ["compare", "tv_difference_matrices"]

TARGET = 0.01


def tv_difference_matrices(nz: int, ny: int, nx: int, z_weight: float = 1.0) -> list[sp.csr_matrix]:
    """Sparse Dy, Dx, Dz of :mod:`volrecon.solvers.tv` acting on the raveled field (Z·Y·X)."""

    def periodic(n: int) -> sp.lil_matrix:
        d = sp.diags([-np.ones(n), np.ones(n - 1)], [0, 1], shape=(n, n)).tolil()
        d[n - 1, 0] = 1
        return d

    py, px = ny + 1, nx + 1
    dz = sp.diags([-np.ones(nz), np.ones(nz - 1)], [0, 1], shape=(nz, nz)).tolil()
    dz[nz - 1, nz - 1] = 0
    eye = sp.identity
    blocks = [sp.kron(sp.kron(eye(nz), periodic(py).tocsr()), eye(px)),
              sp.kron(sp.kron(eye(nz), eye(py)), periodic(px).tocsr()),
              z_weight * sp.kron(sp.kron(dz.tocsr(), eye(py)), eye(px))]
    keep = np.zeros((nz, py, px), bool)
    keep[:, :ny, :nx] = True
    embed = sp.identity(nz * py * px, format="csr")[:, keep.ravel()]
    return [sp.csr_matrix(b @ embed) for b in blocks]


def _pylops_operator(model: PSFModel) -> Any:
    import pylops

    psf = np.asarray(model.store_arrays()["psf"], dtype=np.float64)
    nz, ny, nx = model.shape_in
    planes = [pylops.signalprocessing.Convolve2D((ny, nx), h=psf[z], offset=(ny // 2, nx // 2),
                                                 method="fft", dtype="float64")
              for z in range(nz)]
    op = pylops.HStack(planes, dtype="float64")
    op.dimsd = (ny * nx,)  # flat data vector, as PyProximal's L2 expects
    return op


def _time_to_target(run: Any, optimum: float, *, limit: int = 5000) -> tuple[float, int]:
    """Fewest iterations whose objective is within TARGET (doubling, then bisection), and the
    wall-clock seconds of a solve with that many iterations: (seconds, iterations)."""

    def reached(n: int) -> bool:
        return bool((run(n) - optimum) / abs(optimum) <= TARGET)

    high = 2
    while not reached(high) and high < limit:
        high *= 2
    low = high // 2
    while high - low > 1:
        mid = (low + high) // 2
        if reached(mid):
            high = mid
        else:
            low = mid
    t0 = time.perf_counter()
    run(high)
    return time.perf_counter() - t0, high


def compare(frame: np.ndarray, model: PSFModel, *, tv: float, l1: float,
            budget_seconds: float = 120.0) -> dict[str, Any]:
    """Time volrecon (admm, fista) and PyProximal to within 1 % of the optimum."""
    import pyproximal
    from pyproximal.optimization.primal import ProximalGradient
    from pyproximal.optimization.primaldual import PrimalDual

    nz, ny, nx = model.shape_in
    op = _pylops_operator(model)
    probe = np.random.default_rng(3).random(model.shape_in)
    mismatch = np.linalg.norm((op @ probe.ravel()).ravel() - model.forward(probe).ravel())
    if mismatch > 1e-3 * np.linalg.norm(op @ probe.ravel()):
        raise RuntimeError(f"PyLops operator differs from the model (gap {mismatch:.2e})")
    b = frame.astype(np.float64).ravel()

    def volrecon_value(method: str, iterations: int) -> float:
        v = reconstruct(frame, model, method=method, iterations=iterations, tv=tv, l1=l1,
                        tol=0.0)
        return objective(v, frame, model, tv=tv, l1=l1)

    reference = min(volrecon_value("admm", 3000), volrecon_value("fista", 3000))
    ours = {m: _time_to_target(lambda n, m=m: volrecon_value(m, n), reference)
            for m in ("admm", "fista")}

    def full_objective(x: np.ndarray) -> float:
        r = op.matvec(x) - b
        v = x.reshape(nz, ny, nx)
        return 0.5 * float(r @ r) + l1 * float(x.sum()) + (tv * tv_value(v, 1.0) if tv else 0.0)

    clock: dict[str, Any] = {"start": 0.0, "excluded": 0.0, "reached": None, "iterations": 0}

    def callback(x: np.ndarray, *args: Any) -> None:
        pause = time.perf_counter()
        clock["iterations"] += 1
        if clock["reached"] is None and (full_objective(np.maximum(x, 0)) - reference) / abs(
                reference) <= TARGET:
            clock["reached"] = pause - clock["start"] - clock["excluded"]
        clock["excluded"] += time.perf_counter() - pause
        if pause - clock["start"] - clock["excluded"] > budget_seconds or clock["reached"]:
            raise StopIteration

    x0 = np.zeros(nz * ny * nx)
    lipschitz = model.operator_norm_squared()
    clock["start"] = time.perf_counter()
    try:
        if tv == 0:
            class _NonnegL1(pyproximal.ProxOperator):  # type: ignore[misc]
                """prox of l1·‖x‖₁ + ι(x ≥ 0): PyProximal's L1 prox, then its Box projection."""

                def __init__(self) -> None:
                    super().__init__(None, False)
                    self.l1 = pyproximal.L1(sigma=l1)
                    self.box = pyproximal.Box(lower=0.0)

                def __call__(self, x: np.ndarray) -> float:
                    return l1 * float(np.abs(x).sum())

                def prox(self, x: np.ndarray, tau: float) -> np.ndarray:
                    return np.asarray(self.box.prox(self.l1.prox(x, tau), tau))

            ProximalGradient(pyproximal.L2(Op=op, b=b), _NonnegL1(), x0=x0, tau=1.0 / lipschitz,
                             acceleration="fista", niter=10**6, callback=callback)
        else:
            import pylops

            diffs = [pylops.MatrixMult(d, dtype="float64")
                     for d in tv_difference_matrices(nz, ny, nx)]
            k = pylops.VStack([op, *diffs])
            n_grad = diffs[0].shape[0]
            g = pyproximal.VStack([pyproximal.L2(b=b), pyproximal.L21(ndim=3, sigma=tv)],
                                  nn=[ny * nx, 3 * n_grad])
            # ‖K‖² ≤ ‖A‖² + ‖∇‖² with ‖∇‖² ≤ 12 for these differences.
            knorm = float(np.sqrt(lipschitz + 12.0))
            tau = sigma = 0.99 / knorm
            PrimalDual(pyproximal.Box(lower=0.0), g, k, x0=x0, tau=tau, mu=sigma,
                       niter=10**6, callback=callback)
    except StopIteration:
        pass
    general_seconds = clock["reached"]
    best = min(ours.values())
    return {"tv": tv, "l1": l1, "size_zyx": list(model.shape_in), "optimum": reference,
            "volrecon": {m: {"seconds": s, "iterations": n} for m, (s, n) in ours.items()},
            "pyproximal_seconds": general_seconds,
            "pyproximal_iterations": clock["iterations"],
            "pyproximal_reached": general_seconds is not None,
            "budget_seconds": budget_seconds,
            "speedup": (general_seconds if general_seconds is not None else budget_seconds)
            / best[0]}
