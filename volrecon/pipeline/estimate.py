"""``volrecon run JOB.toml --estimate``: measure a few frames, predict the whole job.

The start of a chain at the beginning of the job's frame range is reconstructed with the job's
own settings and FFT threads, on as many threads at once as the job has local workers (solves
that share the machine run slower than one alone): its first frame is cold, the rest warm.
The job's chain layout (``chain_frames`` stored frames after ``lead_in_frames`` unstored ones,
see :class:`volrecon.solvers.SolverSettings`) then gives each task's solve time exactly as
``Σ_chains cold + (frames solved − 1) · warm``; the job's tasks are dealt to its local workers
in order, each to the first one free, and the last to finish ends the run. What the run pays
once is measured too and added: a fresh Python process importing volrecon (the command
itself), checking the inputs and placing the model, and for the ``processes`` scheduler a
spawned worker process loading the model. The same sums for 108 000 frames are one hour of
30 fps video. The volumes are compressed with the store's codec to predict the store size.
Nothing is written.
"""

from __future__ import annotations

import heapq
import math
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.io.ome_zarr import downsample_yx, level_shape
from volrecon.pipeline.execute import fft_threads_per_task
from volrecon.pipeline.job import prepare_job
from volrecon.pipeline.plan import plan_tasks
from volrecon.pipeline.status import format_duration
from volrecon.pipeline.store import PROJECTIONS, max_projections, store_file_count
from volrecon.solvers.chain import solve_chain

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel
    from volrecon.pipeline.config import JobConfig
    from volrecon.solvers.settings import SolverSettings

__all__ = ["HOUR_FRAMES", "JobEstimate", "chain_solve_seconds", "estimate_job", "makespan"]

#: One hour of video at 30 frames per second.
HOUR_FRAMES = 108_000


@dataclass(frozen=True)
class JobEstimate:
    """Predicted duration and store size of a job.

    Attributes
    ----------
    frames : int
        Frames of the job.
    sampled : int
        Frames reconstructed for the estimate.
    cold_seconds, warm_seconds : float
        Wall-clock seconds of a chain's first (cold) frame and of a warm frame, one worker.
    cold_iterations, warm_iterations : float
        Iterations of the cold frame and mean iterations of the warm ones.
    seconds_per_frame : float
        Mean solve seconds per stored frame over the job's chains, cold starts and lead-ins
        included, in one worker.
    parallel_frames : int
        Frames the job runs at once (local workers; 1 for remote clusters, whose size is
        unknown here — divide by the number of worker threads there).
    start_seconds : float
        What the run pays once, measured: a fresh process importing volrecon, the input
        checks and the model's placement, and for the ``processes`` scheduler a spawned
        worker loading the model.
    seconds : float
        Predicted wall-clock time of the whole job: `start_seconds` plus the time until the
        last task ends when the job's tasks are dealt to `parallel_frames` workers.
    hour_seconds : float
        The same prediction for one hour of 30 fps video (`HOUR_FRAMES` frames).
    store_bytes : float
        Predicted size of the volumes (every resolution level, and the projections) on disk.
    compression_ratio : float
        Raw float32 bytes over the stored bytes (in the store's dtype, compressed) of the
        sampled volumes.
    store_files, hour_files : int
        Files of the finished store, and of one hour's store with the same settings (an upper
        bound, :func:`volrecon.pipeline.store.store_file_count`).
    shard_frames : int
        Frames per file of the frame arrays.
    """

    frames: int
    sampled: int
    cold_seconds: float
    warm_seconds: float
    cold_iterations: float
    warm_iterations: float
    seconds_per_frame: float
    parallel_frames: int
    start_seconds: float
    seconds: float
    hour_seconds: float
    store_bytes: float
    compression_ratio: float
    store_files: int
    hour_files: int
    shard_frames: int

    def summary(self) -> str:
        """Lines for the terminal."""
        return "\n".join([
            f"estimate from {self.sampled} frames: a chain's first frame {self.cold_seconds:.3g} s "
            f"({self.cold_iterations:.0f} iterations), later frames {self.warm_seconds:.3g} s "
            f"({self.warm_iterations:.1f} iterations); {self.seconds_per_frame:.3g} s per frame "
            f"over the job's chains, {self.parallel_frames} at once; start-up "
            f"{self.start_seconds:.3g} s",
            f"whole job: {self.frames} frames in about {format_duration(self.seconds)}",
            f"one hour of 30 fps video ({HOUR_FRAMES} frames) with these settings: about "
            f"{format_duration(self.hour_seconds)}",
            f"store: about {_size(self.store_bytes)} "
            f"(volumes compressed {self.compression_ratio:.2g}x of float32) in at most "
            f"{self.store_files} files ({self.shard_frames} frames per file); one hour: about "
            f"{_size(self.store_bytes / self.frames * HOUR_FRAMES)} in {self.hour_files} files",
        ])


def _size(n: float) -> str:
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:.3g} {unit}"
        n /= 1000
    return f"{n:.3g} TB"  # pragma: no cover


def _compressed_bytes(volumes: np.ndarray, level: int) -> float:
    """Bytes of the chunk files the store's codec writes for `volumes` (a scratch store)."""
    import tempfile
    from pathlib import Path

    import zarr
    from zarr.codecs import ZstdCodec

    with tempfile.TemporaryDirectory() as tmp:
        array = zarr.create_array(zarr.storage.LocalStore(tmp), shape=volumes.shape,
                                  chunks=(1, *volumes.shape[1:]), dtype=volumes.dtype,
                                  compressors=ZstdCodec(level=level))
        array[...] = volumes
        return float(sum(p.stat().st_size for p in (Path(tmp) / "c").rglob("*")
                         if p.is_file()))


def chain_solve_seconds(n_frames: int, settings: SolverSettings, *, cold_seconds: float,
                        warm_seconds: float, start: int = 0) -> float:
    """Solve seconds of stored frames ``start:n_frames`` laid out in the chains of `settings`.

    Chain ``k`` stores ``[k·C, min((k+1)·C, T))`` and solves from ``max(0, k·C − L)``
    (C = ``chain_frames``, L = ``lead_in_frames``): its first solved frame is cold, the rest
    warm. `start` is the first frame of a chain (a task's first frame).

    Examples
    --------
    >>> from volrecon.solvers import SolverSettings
    >>> chain_solve_seconds(10, SolverSettings(chain_frames=4, lead_in_frames=1),
    ...                     cold_seconds=5.0, warm_seconds=1.0)  # solves 4, 5 and 3 frames
    24.0
    """
    total = 0.0
    for first in range(start, n_frames, settings.chain_frames):
        solved = min(first + settings.chain_frames, n_frames) - settings.chain_span(first)
        total += cold_seconds + (solved - 1) * warm_seconds
    return total


def makespan(task_seconds: list[float], workers: int) -> float:
    """Seconds until the last task ends when tasks go, in order, to the first free worker.

    Examples
    --------
    >>> makespan([3.0, 1.0, 1.0, 1.0], 2)  # the other worker runs the short ones meanwhile
    3.0
    """
    free = [0.0] * max(1, workers)
    for seconds in task_seconds:
        heapq.heappush(free, heapq.heappop(free) + seconds)
    return max(free)


def _load_in_worker(path: str, device: str, threads: int) -> None:
    from volrecon.models.base import PSFModel

    PSFModel.load(path).on_device(device, threads=threads)


def _process_seconds(job: JobConfig, threads: int) -> float:
    """Wall seconds of a fresh Python process importing the CLI and the task module; with
    the ``processes`` scheduler, plus a spawned pool worker loading the model (the pool's
    workers start side by side, so one stands for all)."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import volrecon.cli, volrecon.pipeline.task"],
                   check=True, capture_output=True)
    seconds = time.perf_counter() - t0
    if job.compute.scheduler == "processes":
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        t0 = time.perf_counter()
        with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn")) as pool:
            pool.submit(_load_in_worker, str(job.model_path), job.compute.device,
                        threads).result()
        seconds += time.perf_counter() - t0
    return seconds


def _timed_chain(frames: np.ndarray, model: PSFModel, solver: SolverSettings
                 ) -> tuple[list[float], list[float], list[np.ndarray]]:
    """Wall seconds and iterations of each frame of one chain, and its volumes."""
    seconds: list[float] = []
    iterations: list[float] = []
    volumes: list[np.ndarray] = []
    t0 = time.perf_counter()
    for result in solve_chain(frames, model, solver):
        seconds.append(time.perf_counter() - t0)
        iterations.append(result.info.iterations if result.info is not None else math.nan)
        if result.volume is not None:
            volumes.append(result.volume)
        t0 = time.perf_counter()
    return seconds, iterations, volumes


def estimate_job(job: JobConfig, *, sample_frames: int = 5) -> JobEstimate:
    """Reconstruct up to `sample_frames` frames of `job` and predict the whole run."""
    t0 = time.perf_counter()
    prepared = prepare_job(job)
    threads = fft_threads_per_task(job.compute) or 1
    model = prepared.model.on_device(job.compute.device, threads=threads)
    start_seconds = time.perf_counter() - t0 + _process_seconds(job, threads)
    n = max(1, min(sample_frames, prepared.n_frames))
    start = prepared.first_frame
    frames = prepared.correction.apply(prepared.source.read(start, start + n))
    compute = job.compute
    parallel = compute.workers if compute.scheduler in ("threads", "processes", "local-cluster") \
        else 1
    # The sample runs on `parallel` threads at once, as the job's workers will: solves that
    # share this machine's cores and memory run slower than one alone (measured: 1.8x per
    # iteration with 2 workers on 2 cores), so a lone solve would promise too much.
    with ThreadPoolExecutor(parallel) as pool:
        runs = list(pool.map(lambda _: _timed_chain(frames, model, job.solver),
                             range(parallel)))
    seconds = [float(np.mean(column)) for column in zip(*(r[0] for r in runs), strict=True)]
    iterations, volumes = runs[0][1], runs[0][2]
    cold, warm = seconds[0], float(np.mean(seconds[1:])) if n > 1 else seconds[0]
    warm_iterations = float(np.mean(iterations[1:])) if n > 1 else iterations[0]
    solve = chain_solve_seconds(prepared.n_frames, job.solver, cold_seconds=cold,
                                warm_seconds=warm)
    tasks = plan_tasks(np.zeros(prepared.n_frames, np.uint8),
                       chain_frames=job.solver.chain_frames,
                       frames_per_task=compute.frames_per_task, shard_frames=job.shard_frames)
    wall = start_seconds + makespan(
        [chain_solve_seconds(task.stop, job.solver, cold_seconds=cold, warm_seconds=warm,
                             start=task.start) for task in tasks], parallel)
    hour = chain_solve_seconds(HOUR_FRAMES, job.solver, cold_seconds=cold, warm_seconds=warm)
    nz, ny, nx = model.shape_in
    levels = job.level_count(model.shape_in)
    itemsize = np.dtype(job.dtype).itemsize
    if volumes:
        sample = np.stack(volumes)
        compressed = _compressed_bytes(sample.astype(job.dtype), job.compression_level)
        ratio = sample.nbytes / max(compressed, 1.0)
        per_volume = compressed / len(volumes)
        level = sample
        for _ in range(1, levels):
            level = downsample_yx(level)
            per_volume += _compressed_bytes(level.astype(job.dtype),
                                            job.compression_level) / len(volumes)
        if job.max_projections:
            for name in PROJECTIONS:
                projected = np.stack([max_projections(v)[name] for v in volumes])
                per_volume += _compressed_bytes(projected.astype(job.dtype),
                                                job.compression_level) / len(volumes)
    else:
        ratio = 1.0
        voxels = sum(nz * int(np.prod(level_shape((ny, nx), k))) for k in range(levels))
        per_volume = itemsize * (voxels + (ny * nx + nz * nx + nz * ny) * job.max_projections)
    shape = model.shape_in
    files = {n_frames: store_file_count(n_frames, shape, shard_frames=job.shard_frames,
                                        projections=job.max_projections, levels=levels,
                                        dtype=job.dtype)
             for n_frames in (prepared.n_frames, HOUR_FRAMES)}
    return JobEstimate(prepared.n_frames, len(seconds), cold, warm, iterations[0],
                       warm_iterations, solve / prepared.n_frames, parallel, start_seconds,
                       wall,
                       hour / parallel, per_volume * prepared.n_frames, ratio,
                       files[prepared.n_frames], files[HOUR_FRAMES], job.shard_frames)
