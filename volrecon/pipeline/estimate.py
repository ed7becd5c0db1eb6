"""``volrecon run JOB.toml --estimate``: measure a few frames, predict the whole job.

The start of a chain at the beginning of the job's frame range is reconstructed with the job's
own settings and FFT threads: its first frame is cold, the rest warm. The job's chain layout
(``chain_frames`` stored frames after ``lead_in_frames`` unstored ones, see
:class:`volrecon.solvers.SolverSettings`) then gives the solve time exactly as
``Σ_chains cold + (frames solved − 1) · warm``, and the job's local workers run that many frames
at once. The same sum for 108 000 frames is one hour of 30 fps video. The volumes are compressed
with the store's codec to predict the store size. Nothing is written.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.io.ome_zarr import downsample_yx, level_shape
from volrecon.pipeline.execute import fft_threads_per_task
from volrecon.pipeline.job import prepare_job
from volrecon.pipeline.status import format_duration
from volrecon.pipeline.store import PROJECTIONS, max_projections, store_file_count
from volrecon.solvers.chain import solve_chain

if TYPE_CHECKING:
    from volrecon.pipeline.config import JobConfig
    from volrecon.solvers.settings import SolverSettings

__all__ = ["HOUR_FRAMES", "JobEstimate", "chain_solve_seconds", "estimate_job"]

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
    seconds : float
        Predicted wall-clock time of the whole job.
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
            f"over the job's chains, {self.parallel_frames} at once",
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
                        warm_seconds: float) -> float:
    """Solve seconds of `n_frames` stored frames laid out in the chains of `settings`.

    Chain ``k`` stores ``[k·C, min((k+1)·C, T))`` and solves from ``max(0, k·C − L)``
    (C = ``chain_frames``, L = ``lead_in_frames``): its first solved frame is cold, the rest
    warm.

    Examples
    --------
    >>> from volrecon.solvers import SolverSettings
    >>> chain_solve_seconds(10, SolverSettings(chain_frames=4, lead_in_frames=1),
    ...                     cold_seconds=5.0, warm_seconds=1.0)  # solves 4, 5 and 3 frames
    24.0
    """
    total = 0.0
    for start in range(0, n_frames, settings.chain_frames):
        solved = min(start + settings.chain_frames, n_frames) - settings.chain_span(start)
        total += cold_seconds + (solved - 1) * warm_seconds
    return total


def estimate_job(job: JobConfig, *, sample_frames: int = 5) -> JobEstimate:
    """Reconstruct up to `sample_frames` frames of `job` and predict the whole run."""
    prepared = prepare_job(job)
    threads = fft_threads_per_task(job.compute) or 1
    model = prepared.model.on_device(job.compute.device, threads=threads)
    n = max(1, min(sample_frames, prepared.n_frames))
    start = prepared.first_frame
    frames = prepared.correction.apply(prepared.source.read(start, start + n))
    seconds, iterations, volumes = [], [], []
    t0 = time.perf_counter()
    for result in solve_chain(frames, model, job.solver):
        seconds.append(time.perf_counter() - t0)
        iterations.append(result.info.iterations if result.info is not None else math.nan)
        if result.volume is not None:
            volumes.append(result.volume)
        t0 = time.perf_counter()
    cold, warm = seconds[0], float(np.mean(seconds[1:])) if n > 1 else seconds[0]
    warm_iterations = float(np.mean(iterations[1:])) if n > 1 else iterations[0]
    compute = job.compute
    parallel = compute.workers if compute.scheduler in ("threads", "processes", "local-cluster") \
        else 1
    solve = chain_solve_seconds(prepared.n_frames, job.solver, cold_seconds=cold,
                                warm_seconds=warm)
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
                       warm_iterations, solve / prepared.n_frames, parallel, solve / parallel,
                       hour / parallel, per_volume * prepared.n_frames, ratio,
                       files[prepared.n_frames], files[HOUR_FRAMES], job.shard_frames)
