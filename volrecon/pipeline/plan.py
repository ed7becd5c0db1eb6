"""Task planning: which frames still need work, grouped into tasks of whole warm-start chains."""

from __future__ import annotations

import math

import numpy as np

from volrecon.errors import ConfigError
from volrecon.pipeline.store import STATUS_PENDING
from volrecon.pipeline.task import TaskSpec

__all__ = ["chains_per_task", "plan_tasks"]


def chains_per_task(frames_per_task: int, chain_frames: int) -> int:
    """Whole chains per task: ``frames_per_task`` rounded up to a multiple of the chain."""
    if frames_per_task < 1 or chain_frames < 1:
        raise ConfigError(f"frames_per_task ({frames_per_task}) and chain_frames "
                          f"({chain_frames}) must be at least 1")
    return max(1, math.ceil(frames_per_task / chain_frames))


def plan_tasks(status: np.ndarray, *, chain_frames: int, frames_per_task: int) -> list[TaskSpec]:
    """Tasks covering every chain that still has a pending frame.

    Parameters
    ----------
    status : ndarray of shape (T,)
        Per-frame status codes; 0 (pending) needs work.
    chain_frames : int
        Warm-start chain length: chains are ``[k * chain_frames, (k + 1) * chain_frames)``,
        fixed by the job's settings, whatever the task size.
    frames_per_task : int
        Wished task size; a task holds ``ceil(frames_per_task / chain_frames)`` consecutive
        chains that need work (a chain with any pending frame is redone whole, because its
        later frames warm-start from its earlier ones).

    Returns
    -------
    list of TaskSpec
        In frame order, numbered from 0.
    """
    status = np.asarray(status)
    n_frames = int(status.shape[0])
    per_task = chains_per_task(frames_per_task, chain_frames)
    n_chains = math.ceil(n_frames / chain_frames)
    pending = np.zeros(n_chains, bool)
    padded = np.full(n_chains * chain_frames, 1 + STATUS_PENDING, dtype=np.int64)
    padded[:n_frames] = status
    pending = (padded.reshape(n_chains, chain_frames) == STATUS_PENDING).any(axis=1)
    tasks: list[TaskSpec] = []
    group: list[int] = []

    def close() -> None:
        if group:
            tasks.append(TaskSpec(index=len(tasks), start=group[0] * chain_frames,
                                  stop=min((group[-1] + 1) * chain_frames, n_frames)))
            group.clear()

    for chain in range(n_chains):
        if not pending[chain]:
            close()
            continue
        group.append(chain)
        if len(group) == per_task:
            close()
    close()
    return tasks
