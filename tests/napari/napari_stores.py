"""Stores for the napari tests: a half-finished output store and a Gaussian PSF.

The output store is made with the pipeline's own :class:`~volrecon.pipeline.JobStore` (the
layout a running job leaves), its volumes and diagnostics written as a job's tasks would.
(A module of its own, not conftest.py: test modules import from it by a unique name.)
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from volrecon.pipeline.store import (
    STATUS_DONE,
    STATUS_FAILED,
    FrameRecords,
    JobStore,
    max_projections,
)

SHAPE_ZYX = (3, 20, 24)
N_FRAMES = 10
SCALE_TZYX = (0.5, 2.0, 0.65, 0.65)
DEPTH_START_UM = 5.0
#: Frames 0..5 finished, frame 4 of them failed; 6..9 pending.
FINISHED = 6
FAILED_FRAME = 4


@dataclass
class OutputStore:
    """A store as a job leaves it half way, and what was written into it."""

    path: Path
    volumes: np.ndarray  # (T, Z, Y, X) as written; NaN where nothing was written
    status: np.ndarray
    iterations: np.ndarray
    residual: np.ndarray


def gaussian_psf(shape_zyx: tuple[int, int, int]) -> np.ndarray:
    """A Gaussian blur widening with depth, each plane summing to 1."""
    nz, ny, nx = shape_zyx
    y, x = np.mgrid[:ny, :nx]
    planes = [np.exp(-((y - ny // 2) ** 2 + (x - nx // 2) ** 2) / (2 * (1.0 + z) ** 2))
              for z in range(nz)]
    psf = np.stack(planes).astype(np.float32)
    return psf / psf.sum(axis=(1, 2), keepdims=True)


def make_output_store(path: Path, rng: np.random.Generator, *, projections: bool = True
                      ) -> OutputStore:
    """Create a store and fill it like a job stopped after its first two tasks of 3 frames."""
    store = JobStore.create(path, shape_zyx=SHAPE_ZYX, n_frames=N_FRAMES,
                            scale_tzyx=SCALE_TZYX, depth_start_um=DEPTH_START_UM,
                            projections=projections,
                            metadata={"video": {"n_frames": N_FRAMES}, "runs": []})
    started = time.time() - 30.0
    store.update_attributes(runs=[{"started_epoch_s": started, "frames_done_before": 0,
                                   "outcome": "running"}])
    volumes = np.full((N_FRAMES, *SHAPE_ZYX), np.nan, np.float32)
    status = np.zeros(N_FRAMES, np.uint8)
    iterations = np.zeros(N_FRAMES, np.int32)
    residual = np.full(N_FRAMES, np.nan)
    for start in range(0, FINISHED, 3):
        stop = start + 3
        frames = range(start, stop)
        for t in frames:
            if t == FAILED_FRAME:
                continue
            # Ramps plus noise: every voxel distinct, so a wrong index shows.
            volume = (rng.random(SHAPE_ZYX, dtype=np.float32) + t).astype(np.float32)
            store.image[t] = volume
            volumes[t] = volume
            if projections:
                for name, projection in max_projections(volume).items():
                    store.group["projections"][name][t] = projection
        n = stop - start
        task_status = np.array([STATUS_FAILED if t == FAILED_FRAME else STATUS_DONE
                                for t in frames], np.uint8)
        task_iterations = np.array([20 + 3 * t for t in frames], np.int32)
        task_residual = np.array([0.1 / (t + 1) for t in frames])
        store.record(FrameRecords(
            start=start, stop=stop, iterations=task_iterations,
            objective=np.linspace(1.0, 2.0, n), residual=task_residual,
            converged=np.ones(n, bool), seconds=np.full(n, 0.25, np.float32),
            status=task_status,
            failures={FAILED_FRAME: "solver diverged"} if FAILED_FRAME in frames else {}))
        status[start:stop] = task_status
        iterations[start:stop] = task_iterations
        residual[start:stop] = task_residual
    return OutputStore(path=path, volumes=volumes, status=status, iterations=iterations,
                       residual=residual)
