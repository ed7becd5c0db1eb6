"""Per-iteration solver time against the FFT lower bound.

The lower bound of one iteration is what one application of A and one of Aᵀ cannot avoid:
Z forward plus Z inverse real 2-D FFTs of the padded grid. Per-iteration time is measured as
the difference between a long and a short solve divided by the extra iterations, so set-up
costs (spectra, factorisations) do not count. Figures are ratios measured in the same
process, each repeat against the bound timed beside it, because absolute times on shared
machines are noisy.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from volrecon.bench import ITERATION_TARGETS
from volrecon.models import PSFModel
from volrecon.solvers import reconstruct

__all__ = ["fft_lower_bound", "per_iteration_costs", "per_iteration_seconds", "run"]

CASES = (("fista", 0.0, 1e-3), ("rl", 0.0, 0.0), ("admm", 0.0, 1e-3), ("admm", 1e-3, 0.0),
         ("fista", 1e-3, 0.0), ("rl", 1e-3, 0.0))


def _synchronize(backend: Any) -> None:
    if backend.device == "gpu":
        backend.xp.cuda.Device().synchronize()


def fft_lower_bound(model: PSFModel, *, repeats: int = 7) -> float:
    """Fastest of `repeats` timings of Z forward + Z inverse real 2-D FFTs of the padded grid."""
    return _bound_clocks(model, repeats=repeats)[0]


def per_iteration_seconds(frame: Any, model: PSFModel, method: str, *, tv: float, l1: float,
                          short: int = 3, long: int = 13, repeats: int = 5,
                          ) -> tuple[float, float]:
    """Per-iteration time and its ratio to the FFT bound, each the median over `repeats`.

    One repeat times a `short` and a `long` solve (tol = 0) and the FFT bound right before and
    after them; its ratio is ``(time(long) − time(short)) / (long − short) / bound``. Load
    changes on a shared machine hit the solve and the bound of one repeat alike, and the
    median drops the repeats a burst of other work fell into.
    """
    seconds, ratio, _ = per_iteration_costs(frame, model, method, tv=tv, l1=l1, short=short,
                                            long=long, repeats=repeats)
    return seconds, ratio


def per_iteration_costs(frame: Any, model: PSFModel, method: str, *, tv: float, l1: float,
                        short: int = 3, long: int = 13, repeats: int = 5,
                        ) -> tuple[float, float, float]:
    """:func:`per_iteration_seconds` plus the same ratio in process CPU time (all threads).

    CPU time does not count the time other processes hold the cores, so on a busy machine it
    stays put where wall-clock ratios scatter; threads that wait for each other cost wall time
    but no CPU time, so on a quiet machine it is at most the wall-clock ratio.
    """
    # One short solve first: it loads (or compiles) the kernels and warms the FFT plans.
    reconstruct(frame, model, method=method, iterations=2, tv=tv, l1=l1, tol=0.0)
    seconds, ratios, cpu_ratios = [], [], []
    for _ in range(repeats):
        bound, cpu_bound = _bound_clocks(model, repeats=3)
        durations, cpu_durations = [], []
        for n in (short, long):
            _synchronize(model.backend)
            t0, c0 = time.perf_counter(), time.process_time()
            reconstruct(frame, model, method=method, iterations=n, tv=tv, l1=l1, tol=0.0)
            _synchronize(model.backend)
            durations.append(time.perf_counter() - t0)
            cpu_durations.append(time.process_time() - c0)
        bound_after, cpu_bound_after = _bound_clocks(model, repeats=3)
        per_iteration = (durations[1] - durations[0]) / (long - short)
        seconds.append(per_iteration)
        ratios.append(per_iteration / min(bound, bound_after))
        cpu_ratios.append((cpu_durations[1] - cpu_durations[0]) / (long - short)
                          / max(min(cpu_bound, cpu_bound_after), 1e-9))
    return float(np.median(seconds)), float(np.median(ratios)), float(np.median(cpu_ratios))


def _bound_clocks(model: PSFModel, *, repeats: int) -> tuple[float, float]:
    """Fastest wall-clock and fastest process-CPU time of the FFT bound over `repeats`."""
    be = model.backend
    shape = model.padded_shape
    planes = be.asarray(np.random.default_rng(0).random((model.n_planes, *shape),
                                                         dtype=np.float32), dtype=model.dtype)
    spectra = be.rfft2(planes, shape)
    wall, cpu = [], []
    for _ in range(repeats):
        _synchronize(be)
        t0, c0 = time.perf_counter(), time.process_time()
        be.rfft2(planes, shape)
        be.irfft2(spectra, shape)
        _synchronize(be)
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return min(wall), min(cpu)


def problem(nz: int, ny: int, nx: int, device: str, threads: int | None) -> tuple[Any, PSFModel]:
    """A simulated diffuser PSF (our optics bench) and a noisy frame of scattered beads."""
    from volrecon.simulate import MicroscopeDesign

    rng = np.random.default_rng(1)
    design = MicroscopeDesign(shape_yx=(ny, nx))
    psf = design.psf_stack(design.depths_um(nz, 2.0)).psf_zyx
    psf = psf / psf.sum(axis=(1, 2), keepdims=True)
    model = PSFModel.from_stack(psf, 2.0, 1.0).on_device(device, threads=threads)
    truth = (rng.random((nz, ny, nx)) > 0.999).astype(np.float32)
    frame = model.backend.to_numpy(model.forward(truth))
    frame += 0.01 * float(frame.max()) * rng.standard_normal(frame.shape).astype(np.float32)
    model.operator_norm_squared()
    return frame, model


def run(sizes: Sequence[tuple[int, int, int]], *, device: str = "cpu",
        threads: int | None = None) -> list[dict[str, Any]]:
    """Measure every solver case at every size; returns one record per (size, case)."""
    records = []
    for nz, ny, nx in sizes:
        frame, model = problem(nz, ny, nx, device, threads)
        for method, tv, l1 in CASES:
            seconds, ratio, cpu_ratio = per_iteration_costs(frame, model, method, tv=tv, l1=l1)
            target = ITERATION_TARGETS[method]
            records.append({"size_zyx": [nz, ny, nx], "padded_yx": list(model.padded_shape),
                            "method": method, "tv": tv, "l1": l1, "device": device,
                            "threads": model.backend.threads, "seconds_per_iteration": seconds,
                            "fft_bound_seconds": seconds / ratio, "ratio_to_bound": ratio,
                            "cpu_ratio_to_bound": cpu_ratio, "target": target,
                            "meets_target": ratio <= target})
    return records
