"""Whole-job throughput: marginal wall seconds per frame of ``volrecon run`` on a simulated video.

Reproduce: ``volrecon bench --pipeline`` (options ``--frames N``, ``--size Z Y X``,
``--scheduler threads|processes``, ``--json``).

A hydrogel video is simulated and its bead scan calibrated (:mod:`volrecon.simulate`,
:func:`volrecon.calibrate.calibrate_file`); a job file (ADMM, ``iterations = "auto"``, tv 0
or ``--tv``, warm starts, the job defaults for chains and lead-ins) then runs through
:func:`volrecon.pipeline.run_job` with `workers` workers, for each scheduler twice: on the first
``n_short`` frames and on all ``n_frames``, into separate stores. The marginal wall time per
frame, ``(t_all − t_short) / (n_frames − n_short)``, leaves out what both runs pay once
(imports, model load, kernel compilation, pool start); ``n_frames − n_short`` is a whole number
of tasks per worker, so both runs end with the same idle tail.

Figures, each measured in this one run:

- wall per frame ÷ solve per frame per worker: the solve seconds the store records
  (``diagnostics/seconds``) for the frames ``n_short:n_frames`` of the long run, which count
  each chain's unstored lead-in solves on its first stored frame (the ``+lead-in`` ratio, the
  one with the target). The lead-in frames are also solved again in this process, and the
  first ratio leaves that time out (the stored frames' own solves).
- wall per frame in units of the FFT lower bound (:func:`volrecon.bench.iteration.
  fft_lower_bound`) on the FFT threads of one worker.
- hours for :data:`HOUR_OF_VIDEO_FRAMES` frames: measured at the simulated size and, at
  16×128², scaled to 32×512² by the ratio of the two FFT bounds (timed here; not measured).
- quality: mean blurred correlation of the stored volumes with the simulated truth
  (:func:`volrecon.simulate.scoring.blurred_correlation`), against that of one warm chain of
  :data:`REFERENCE_ITERATIONS` ADMM iterations per frame over the first frames.
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.errors import ConfigError, DataError

__all__ = ["HOUR_OF_VIDEO_FRAMES", "TARGETS", "marginal_span", "report_lines", "run"]

#: One hour of video at 30 frames per second.
HOUR_OF_VIDEO_FRAMES = 108_000
#: Targets of the figures (tracker issue 14): upper bounds, except the quality ratio.
TARGETS = {"wall_to_solve": 1.10, "frame_in_bounds": 20.0, "frame_in_bounds_aim": 10.0,
           "hours": 8.0, "quality_ratio": 0.98}
#: Iterations per frame of the quality reference (one warm chain, tol 0).
REFERENCE_ITERATIONS = 200
#: The size the 16×128² figures are scaled to, by the FFT-bound ratio.
SCALED_SIZE_ZYX = (32, 512, 512)
SCALED_FROM_ZYX = (16, 128, 128)


def marginal_span(n_frames: int, task_frames: int, workers: int) -> int:
    """Frames of the long run beyond the short one: a whole number of tasks per worker.

    The largest multiple of ``task_frames * workers`` that leaves at least that many frames to
    the short run; when the video is too short for that, half of it.

    Raises
    ------
    ConfigError
        If `n_frames` is below 2.
    """
    if n_frames < 2:
        raise ConfigError(f"--frames must be at least 2 for a marginal time; got {n_frames}")
    unit = task_frames * workers
    span = unit * ((n_frames - unit) // unit)
    return span if span > 0 else n_frames // 2


def _simulate(folder: Path, *, n_frames: int, size_zyx: tuple[int, int, int]) -> Any:
    from volrecon.calibrate import calibrate_file
    from volrecon.simulate import MicroscopeDesign, write_hydrogel_scenario

    nz, ny, nx = size_zyx
    scenario = write_hydrogel_scenario(folder / "raw", rng=0, n_frames=n_frames, n_planes=nz,
                                       design=MicroscopeDesign(shape_yx=(ny, nx)))
    calibrate_file(scenario.files["psf_scan"], folder / "model",
                   depth_step_um=scenario.depth_step_um, pixel_size_um=scenario.pixel_size_um,
                   depth_start_um=scenario.depth_start_um, dark_path=scenario.files["dark"])
    return scenario


def _write_job(folder: Path, scenario: Any, *, name: str, frames: int, scheduler: str,
               workers: int, threads: int | None, iterations: int | str,
               chain_frames: int | None, tv: float = 0.0) -> Path:
    import tomli_w

    solver: dict[str, Any] = {"method": "admm", "iterations": iterations, "tv": tv,
                              "warm_start": True}
    if chain_frames is not None:
        solver["chain_frames"] = chain_frames
    compute: dict[str, Any] = {"scheduler": scheduler, "workers": workers}
    if threads is not None:
        compute["threads"] = threads
    document = {
        "model": {"path": "model"},
        "video": {"path": os.path.relpath(scenario.files["video"], folder),
                  "dark": os.path.relpath(scenario.files["dark"], folder),
                  "frames": [0, frames]},
        "solver": solver,
        "output": {"path": f"{name}.zarr", "time_interval_s": scenario.frame_interval_s,
                   "max_projections": True},
        "compute": compute,
    }
    path = folder / f"{name}.toml"
    path.write_bytes(tomli_w.dumps(document).encode())
    return path


def _timed_run(job_path: Path) -> tuple[float, Path]:
    """Wall seconds of ``run_job`` (inputs checked, store made, every frame done) and the store."""
    from volrecon.pipeline import load_job, run_job

    job = load_job(job_path)
    t0 = time.perf_counter()
    result = run_job(job)
    seconds = time.perf_counter() - t0
    if result.failed or not result.complete:
        raise DataError(f"{result.store_path}: {result.failed} of {result.total} frames failed "
                        f"and {result.total - result.done} are not done; the benchmark needs "
                        "every frame (see `volrecon status` of the store)")
    return seconds, result.store_path


def _lead_in_seconds(job_path: Path, first: int, stop: int, threads: int) -> float:
    """Solve seconds of the lead-in frames of the chains that start in ``first:stop``."""
    from volrecon.pipeline import load_job, prepare_job
    from volrecon.solvers import solve_chain

    prepared = prepare_job(load_job(job_path))
    solver = prepared.job.solver
    model = prepared.model.on_device("cpu", threads=threads)
    total = 0.0
    chain = solver.chain_frames
    for chain_start in range(-(-first // chain) * chain, stop, chain):
        lead = solver.chain_span(chain_start)
        if lead == chain_start:
            continue
        frames = prepared.correction.apply(prepared.source.read(lead, chain_start))
        for result in solve_chain(frames, model, solver):
            total += result.info.seconds if result.info is not None else math.nan
    return total


def _quality(store_path: Path, truth_path: Path, job_path: Path, *, reference_frames: int,
             chain_frames: int) -> dict[str, Any]:
    from volrecon.pipeline import JobStore, load_job, prepare_job
    from volrecon.simulate.scoring import blurred_correlation
    from volrecon.solvers import SolverSettings, solve_chain

    image = JobStore.open(store_path, mode="r").image
    truth = np.load(truth_path, mmap_mode="r")
    scores = np.array([blurred_correlation(image[t], truth[t]) for t in range(image.shape[0])])
    prepared = prepare_job(load_job(job_path))
    n_reference = min(reference_frames, image.shape[0])
    frames = prepared.correction.apply(prepared.source.read(0, n_reference))
    settings = SolverSettings(method="admm", iterations=REFERENCE_ITERATIONS, tol=0.0,
                              tv=prepared.job.solver.tv, l1=prepared.job.solver.l1,
                              chain_frames=n_reference)
    model = prepared.model.on_device("cpu")
    reference = []
    for t, result in enumerate(solve_chain(frames, model, settings)):
        if result.volume is None:
            raise DataError(f"quality reference: frame {t} failed ({result.failure})")
        reference.append(blurred_correlation(result.volume, truth[t]))
    starts = np.arange(image.shape[0])
    is_start = (starts % chain_frames == 0) & (starts > 0)
    subset = float(scores[:n_reference].mean())
    return {"correlation": float(scores.mean()), "frames": int(scores.size),
            "reference_frames": n_reference, "reference_iterations": REFERENCE_ITERATIONS,
            "correlation_reference_frames": subset,
            "reference_correlation": float(np.mean(reference)),
            "ratio_to_reference": subset / float(np.mean(reference)),
            "chain_start_frames": int(is_start.sum()),
            "chain_start_correlation": float(scores[is_start].mean()) if is_start.any()
            else None,
            "other_correlation": float(scores[~is_start].mean())}


def _stores_identical(paths: Sequence[Path]) -> bool:
    from volrecon.pipeline import JobStore

    images = [JobStore.open(path, mode="r").image for path in paths]
    return all(np.array_equal(images[0][t], other[t])
               for other in images[1:] for t in range(images[0].shape[0]))


def _measure(folder: Path, scenario: Any, *, n_frames: int, schedulers: Sequence[str],
             workers: int, threads: int | None, reference_frames: int,
             iterations: int | str, chain_frames: int | None, tv: float) -> dict[str, Any]:
    from volrecon.bench.iteration import fft_lower_bound
    from volrecon.models import PSFModel
    from volrecon.pipeline import JobStore, fft_threads_per_task, load_job
    from volrecon.pipeline.plan import chains_per_task

    def job(name: str, frames: int, scheduler: str) -> Path:
        return _write_job(folder, scenario, name=name, frames=frames, scheduler=scheduler,
                          workers=workers, threads=threads, iterations=iterations,
                          chain_frames=chain_frames, tv=tv)

    warm_up = job("warm-up", min(n_frames, workers), schedulers[0])
    config = load_job(warm_up)
    solver, compute = config.solver, config.compute
    fft_threads = fft_threads_per_task(compute) or 1
    task_frames = chains_per_task(compute.frames_per_task, solver.chain_frames) \
        * solver.chain_frames
    parallel = {s: 1 if s == "synchronous" else workers for s in schedulers}
    n_short = n_frames - marginal_span(n_frames, task_frames, max(parallel.values()))
    span = n_frames - n_short
    model = PSFModel.load(config.model_path).on_device("cpu", threads=fft_threads)
    bound = fft_lower_bound(model)
    _timed_run(warm_up)  # imports, kernels and FFT plans of this process
    records: list[dict[str, Any]] = []
    long_jobs: list[Path] = []
    long_stores: list[Path] = []
    for scheduler in schedulers:
        short_seconds, _ = _timed_run(job(f"{scheduler}-short", n_short, scheduler))
        long_jobs.append(job(f"{scheduler}-all", n_frames, scheduler))
        all_seconds, store_path = _timed_run(long_jobs[-1])
        long_stores.append(store_path)
        diagnostics = JobStore.open(store_path, mode="r").diagnostics()
        marginal = (all_seconds - short_seconds) / span
        solve = float(np.sum(diagnostics["seconds"][n_short:], dtype=np.float64)) / span
        records.append({
            "scheduler": scheduler, "seconds_short": short_seconds, "seconds_all": all_seconds,
            "marginal_seconds_per_frame": marginal, "solve_seconds_per_frame": solve,
            "mean_iterations": float(np.mean(diagnostics["iterations"])),
            "hours": marginal * HOUR_OF_VIDEO_FRAMES / 3600})
    bound = min(bound, fft_lower_bound(model))
    lead_in = _lead_in_seconds(long_jobs[0], n_short, n_frames, fft_threads) / span
    for record in records:
        solved = record["solve_seconds_per_frame"] / parallel[record["scheduler"]]
        own = (record["solve_seconds_per_frame"] - lead_in) / parallel[record["scheduler"]]
        record["wall_to_solve"] = record["marginal_seconds_per_frame"] / own
        record["wall_to_solve_with_lead_in"] = record["marginal_seconds_per_frame"] / solved
        record["frame_in_bounds"] = record["marginal_seconds_per_frame"] / bound
    quality = _quality(long_stores[0], scenario.files["truth_volumes"], long_jobs[0],
                       reference_frames=reference_frames, chain_frames=solver.chain_frames)
    return {"padded_yx": list(model.padded_shape), "frames": n_frames, "frames_short": n_short,
            "workers": workers, "fft_threads": fft_threads, "chain_frames": solver.chain_frames,
            "lead_in_frames": solver.lead_in_frames, "task_frames": task_frames,
            "fft_bound_seconds": bound, "lead_in_solve_seconds_per_frame": lead_in,
            "schedulers": records,
            "stores_identical": _stores_identical(long_stores) if len(long_stores) > 1
            else None, "quality": quality}


def run(*, n_frames: int = 240, size_zyx: tuple[int, int, int] = (16, 128, 128),
        schedulers: Sequence[str] = ("threads", "processes"), workers: int = 2,
        threads: int | None = None, reference_frames: int = 40,
        iterations: int | str = "auto", chain_frames: int | None = None, tv: float = 0.0,
        directory: str | os.PathLike[str] | None = None) -> dict[str, Any]:
    """Simulate, calibrate and run the job per scheduler; return the figures (see module doc).

    Parameters
    ----------
    n_frames : int
        Frames of the simulated video (at least 2).
    size_zyx : tuple of int
        Depth planes and sensor shape (Y, X).
    schedulers : sequence of str
        Local dask schedulers (``[compute] scheduler``), each timed on stores of its own.
    workers : int
        ``[compute] workers`` (at least 1).
    threads : int, optional
        ``[compute] threads`` (FFT threads per worker); default the job's (cores / workers).
    reference_frames : int
        Frames of the quality reference, from the first (at least 1).
    iterations : int or "auto"
        ``[solver] iterations`` of the job.
    chain_frames : int, optional
        ``[solver] chain_frames``; default the job's.
    tv : float
        ``[solver] tv`` of the job and of the quality reference (0: no TV; the demo's job
        files use 1e-3).
    directory : path-like, optional
        Where the simulation, the job files and the stores go (kept); default a temporary
        folder, deleted afterwards.

    Returns
    -------
    dict
        JSON-ready figures: sizes and settings, ``fft_bound_seconds``, one record per scheduler
        under ``"schedulers"``, ``"quality"``, ``"scaled"`` (None unless the size is 16×128²),
        ``"auto_stop_change"`` (the ADMM threshold in force) and ``"targets"``.

    Raises
    ------
    ConfigError
        For fewer than 2 frames, no scheduler, one that is not a local one, fewer than one
        worker or reference frame.
    DataError
        If a frame of a job or of the reference fails.
    """
    from volrecon.bench.iteration import fft_lower_bound, problem
    from volrecon.solvers.reconstruct import AUTO_STOP_CHANGE

    if not schedulers or any(s not in ("threads", "processes", "synchronous")
                             for s in schedulers):
        raise ConfigError(f"schedulers must be some of threads, processes, synchronous; "
                          f"got {list(schedulers)}")
    if n_frames < 2 or workers < 1 or reference_frames < 1:
        raise ConfigError(f"need at least 2 frames, 1 worker and 1 reference frame; got "
                          f"{n_frames}, {workers} and {reference_frames}")
    with contextlib.ExitStack() as stack:
        folder = Path(directory) if directory is not None else Path(
            stack.enter_context(tempfile.TemporaryDirectory(prefix="volrecon-bench-")))
        folder.mkdir(parents=True, exist_ok=True)
        scenario = _simulate(folder, n_frames=n_frames, size_zyx=size_zyx)
        report = {"size_zyx": list(size_zyx), **_measure(
            folder, scenario, n_frames=n_frames, schedulers=schedulers, workers=workers,
            threads=threads, reference_frames=reference_frames, iterations=iterations,
            chain_frames=chain_frames, tv=tv)}
    report["tv"] = tv
    report["scaled"] = None
    if tuple(size_zyx) == SCALED_FROM_ZYX:
        _, big = problem(*SCALED_SIZE_ZYX, "cpu", report["fft_threads"])
        ratio = fft_lower_bound(big, repeats=3) / report["fft_bound_seconds"]
        report["scaled"] = {
            "size_zyx": list(SCALED_SIZE_ZYX), "padded_yx": list(big.padded_shape),
            "fft_bound_seconds": ratio * report["fft_bound_seconds"], "bound_ratio": ratio,
            "hours": {r["scheduler"]: r["hours"] * ratio for r in report["schedulers"]}}
    report["iterations"] = iterations
    report["auto_stop_change"] = AUTO_STOP_CHANGE["admm"]
    report["targets"] = dict(TARGETS)
    return report


def report_lines(report: dict[str, Any]) -> list[str]:
    """The figures of :func:`run` as lines of a table, each beside its target."""
    z, y, x = report["size_zyx"]
    n, n_short = report["frames"], report["frames_short"]
    targets = report["targets"]
    py, px = report["padded_yx"]
    threads = report["fft_threads"]
    iterations = (f"iterations auto (stop change {report['auto_stop_change']:.0e})"
                  if report["iterations"] == "auto" else f"{report['iterations']} iterations")
    lines = [
        f"Pipeline: {n} simulated frames of {z}x{y}x{x} (padded {py}x{px}); admm, {iterations}, "
        f"tv {report.get('tv', 0.0):g}; chains of {report['chain_frames']} frames after "
        f"{report['lead_in_frames']} "
        f"lead-in frames; {_count(report['workers'], 'worker')} x "
        f"{_count(threads, 'FFT thread')}",
        f"wall s/frame = (t({n}) - t({n_short})) / {n - n_short}, measured; solve s/frame = "
        f"store diagnostics/seconds of frames {n_short}:{n} / {n - n_short} (one worker, "
        "lead-ins included); "
        f"FFT bound ({z} rfft2 + {z} irfft2 of {py}x{px}, {_count(threads, 'thread')}) "
        f"{report['fft_bound_seconds']:.5f} s",
        f"{'scheduler':>10} {f't({n_short}) s':>9} {f't({n}) s':>9} {'wall s/fr':>9} "
        f"{'solve s/fr':>10} {'wall/solve':>10} {'+lead-in':>8} {'target':>6} "
        f"{'FFT bounds':>10} {'target':>9} {'iter/fr':>7} {f'h/{HOUR_OF_VIDEO_FRAMES}':>8} "
        f"{'target':>6}",
    ]
    aims = (f"<={targets['wall_to_solve']:g}",
            f"<={targets['frame_in_bounds']:g} ({targets['frame_in_bounds_aim']:g})",
            f"<{targets['hours']:g}")
    for r in report["schedulers"]:
        lines.append(
            f"{r['scheduler']:>10} {r['seconds_short']:>9.1f} {r['seconds_all']:>9.1f} "
            f"{r['marginal_seconds_per_frame']:>9.4f} {r['solve_seconds_per_frame']:>10.4f} "
            f"{r['wall_to_solve']:>10.3f} {r['wall_to_solve_with_lead_in']:>8.3f} "
            f"{aims[0]:>6} {r['frame_in_bounds']:>10.1f} {aims[1]:>9} "
            f"{r['mean_iterations']:>7.1f} {r['hours']:>8.2f} {aims[2]:>6}")
    lead_in = report["lead_in_solve_seconds_per_frame"]
    lines.append(f"'+lead-in' counts the {report['lead_in_frames']} unstored lead-in solves "
                 "per chain (the store records them on the chain's first frame); 'wall/solve' "
                 f"leaves out their time re-solved here ({lead_in:.4f} s per stored frame); "
                 "hours are measured at this size")
    scaled = report["scaled"]
    if scaled is not None:
        sz, sy, sx = scaled["size_zyx"]
        hours = ", ".join(f"{k} {v:.1f} h" for k, v in scaled["hours"].items())
        lines.append(f"hours for {HOUR_OF_VIDEO_FRAMES} frames at {sz}x{sy}x{sx}, SCALED (not "
                     f"measured) by the FFT bound ratio {scaled['bound_ratio']:.1f} timed in "
                     f"this run: {hours}")
    q = report["quality"]
    lines.append(
        f"quality (blurred correlation with the truth, mean over frames): {q['correlation']:.4f}"
        f" over {q['frames']} frames; first {q['reference_frames']}: "
        f"{q['correlation_reference_frames']:.4f} vs {q['reference_correlation']:.4f} for one "
        f"warm chain of {q['reference_iterations']} ADMM iterations per frame: ratio "
        f"{q['ratio_to_reference']:.4f} (target >= {targets['quality_ratio']:g})")
    starts = (f"{q['chain_start_correlation']:.4f} over {q['chain_start_frames']} frames"
              if q["chain_start_frames"] else "none in this video")
    lines.append(f"chain-start frames (t % {report['chain_frames']} == 0, t > 0): {starts}; "
                 f"the other {q['frames'] - q['chain_start_frames']}: "
                 f"{q['other_correlation']:.4f}")
    if report["stores_identical"] is not None:
        names = " and ".join(r["scheduler"] for r in report["schedulers"])
        lines.append(f"stores of {names} bit-identical: "
                     f"{'yes' if report['stores_identical'] else 'NO'}")
    return lines


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}{'s' * (n != 1)}"
