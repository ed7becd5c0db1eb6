"""``volrecon run JOB.toml --estimate``: measure a few frames, predict the whole job.

A short warm-start chain at the start of the job's frame range is reconstructed with the job's
own settings and FFT threads; the time per frame after the first (warm frames, as most of a job
is) sets the pace, and the job's local workers run that many frames at once. The volumes are
compressed with the store's codec to predict the store size. Nothing is written.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.pipeline.execute import fft_threads_per_task
from volrecon.pipeline.job import prepare_job
from volrecon.pipeline.status import format_duration
from volrecon.pipeline.store import PROJECTIONS, max_projections
from volrecon.solvers.chain import solve_chain

if TYPE_CHECKING:
    from volrecon.pipeline.config import JobConfig

__all__ = ["JobEstimate", "estimate_job"]


@dataclass(frozen=True)
class JobEstimate:
    """Predicted duration and store size of a job.

    Attributes
    ----------
    frames : int
        Frames of the job.
    sampled : int
        Frames reconstructed for the estimate.
    seconds_per_frame : float
        Wall-clock seconds of one warm frame in one worker.
    mean_iterations : float
        Iterations the sampled frames needed.
    parallel_frames : int
        Frames the job runs at once (local workers; 1 for remote clusters, whose size is
        unknown here — divide by the number of worker threads there).
    seconds : float
        Predicted wall-clock time of the whole job.
    store_bytes : float
        Predicted size of the volumes (and projections) on disk.
    compression_ratio : float
        Raw float32 bytes over compressed bytes of the sampled volumes.
    """

    frames: int
    sampled: int
    seconds_per_frame: float
    mean_iterations: float
    parallel_frames: int
    seconds: float
    store_bytes: float
    compression_ratio: float

    def summary(self) -> str:
        """Lines for the terminal."""
        return "\n".join([
            f"estimate from {self.sampled} frames: {self.seconds_per_frame:.3g} s per frame "
            f"({self.mean_iterations:.0f} iterations), {self.parallel_frames} at once",
            f"whole job: {self.frames} frames in about {format_duration(self.seconds)}",
            f"store: about {_size(self.store_bytes)} "
            f"(compression {self.compression_ratio:.2g}x of float32)",
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
                                  chunks=(1, *volumes.shape[1:]), dtype="float32",
                                  compressors=ZstdCodec(level=level))
        array[...] = volumes
        return float(sum(p.stat().st_size for p in (Path(tmp) / "c").rglob("*")
                         if p.is_file()))


def estimate_job(job: JobConfig, *, sample_frames: int = 3) -> JobEstimate:
    """Reconstruct up to `sample_frames` frames of `job` and predict the whole run."""
    prepared = prepare_job(job)
    threads = fft_threads_per_task(job.compute) or 1
    model = prepared.model.on_device(job.compute.device, threads=threads)
    n = max(1, min(sample_frames, prepared.n_frames, job.solver.chain_frames))
    start = prepared.first_frame
    frames = prepared.correction.apply(prepared.source.read(start, start + n))
    seconds, iterations, volumes = [], [], []
    t0 = time.perf_counter()
    for result in solve_chain(frames, model, job.solver):
        seconds.append(time.perf_counter() - t0)
        if result.info is not None:
            iterations.append(result.info.iterations)
        if result.volume is not None:
            volumes.append(result.volume)
        t0 = time.perf_counter()
    per_frame = float(np.mean(seconds[1:] if len(seconds) > 1 else seconds))
    compute = job.compute
    parallel = compute.workers if compute.scheduler in ("threads", "processes", "local-cluster") \
        else 1
    total = per_frame * prepared.n_frames / parallel
    nz, ny, nx = model.shape_in
    if volumes:
        sample = np.stack(volumes)
        compressed = _compressed_bytes(sample, job.compression_level)
        ratio = sample.nbytes / max(compressed, 1.0)
        per_volume = compressed / len(volumes)
        if job.max_projections:
            for name in PROJECTIONS:
                projected = np.stack([max_projections(v)[name] for v in volumes])
                per_volume += _compressed_bytes(projected, job.compression_level) / len(volumes)
    else:
        ratio = 1.0
        per_volume = 4.0 * (nz * ny * nx + (ny * nx + nz * nx + nz * ny) * job.max_projections)
    return JobEstimate(prepared.n_frames, len(seconds), per_frame,
                       float(np.mean(iterations)) if iterations else math.nan, parallel, total,
                       per_volume * prepared.n_frames, ratio)
