"""What a warm solve costs beyond its iterations, in units of the FFT lower bound.

A job's frame is one :func:`volrecon.solvers.solve_frame` call warm-started from the previous
frame's state: set-up, the iterations, then the objective and the relative residual of the
result. Timing warm solves of ``k`` iterations for several ``k`` (tol = 0) and fitting
``t(k) = overhead + k · per_iteration`` separates the two; both are reported as multiples of the
FFT bound (Z forward + Z inverse real 2-D FFTs of the padded grid) timed in the same run.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from volrecon.bench.iteration import fft_lower_bound, problem
from volrecon.solvers import SolverSettings, solve_frame

__all__ = ["CASES", "ITERATION_COUNTS", "run", "warm_solve_seconds"]

#: Iterations per timed warm solve.
ITERATION_COUNTS = (1, 3, 5, 9)
#: The budget of issue "throughput": a warm solve's fixed cost is at most two bound-iterations.
OVERHEAD_TARGET = 2.0


def warm_solve_seconds(frame: Any, model: Any, settings: SolverSettings, *,
                       repeats: int = 5) -> float:
    """Fastest of `repeats` warm solves (from a converged state of the same frame)."""
    import time

    start = solve_frame(frame, model, SolverSettings(method=settings.method, iterations=40,
                                                     tv=settings.tv, l1=settings.l1, tol=0.0))
    if start.info is None:
        raise RuntimeError(f"overhead benchmark: the set-up solve failed ({start.failure})")
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        solve_frame(frame, model, settings, init=start.info.state)
        times.append(time.perf_counter() - t0)
    return min(times)


#: (method, tv) of the timed warm solves: every method without a prior, and ADMM with the
#: TV weight of the demo and the job files (its volume solve then has factors to keep).
CASES = (("admm", 0.0), ("admm", 1e-3), ("fista", 0.0), ("rl", 0.0))


def run(sizes: Sequence[tuple[int, int, int]], *, device: str = "cpu",
        threads: int | None = None, cases: Sequence[tuple[str, float]] = CASES,
        ) -> list[dict[str, Any]]:
    """One record per (size, case): overhead and per-iteration cost in bound-iterations."""
    records = []
    for nz, ny, nx in sizes:
        frame, model = problem(nz, ny, nx, device, threads)
        for method, tv in cases:
            bound = fft_lower_bound(model)
            counts = np.array(ITERATION_COUNTS, dtype=float)
            seconds = np.array([warm_solve_seconds(
                frame, model, SolverSettings(method=method, iterations=int(k), tv=tv, tol=0.0))
                for k in ITERATION_COUNTS])
            bound = min(bound, fft_lower_bound(model))
            slope, intercept = np.polyfit(counts, seconds / bound, 1)
            records.append({"size_zyx": [nz, ny, nx], "method": method, "tv": tv,
                            "device": device,
                            "threads": model.backend.threads, "fft_bound_seconds": bound,
                            "iterations": list(ITERATION_COUNTS),
                            "solve_in_bounds": [float(s / bound) for s in seconds],
                            "per_iteration_in_bounds": float(slope),
                            "overhead_in_bounds": float(intercept),
                            "overhead_target": OVERHEAD_TARGET})
    return records
