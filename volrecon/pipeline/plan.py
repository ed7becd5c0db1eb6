"""Task planning: which frames still need work, grouped into tasks of whole warm-start chains
and whole shard files."""

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


def plan_tasks(status: np.ndarray, *, chain_frames: int, frames_per_task: int,
               shard_frames: int = 1) -> list[TaskSpec]:
    """Tasks covering every block that still has a pending frame.

    A block is ``max(chain_frames, shard_frames)`` frames (one divides the other): whole
    warm-start chains and whole shard files, so a shard has exactly one writer, the task that
    computes all of its frames.

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
    shard_frames : int
        Frames per file of the store's frame arrays (1: not sharded). A block with any pending
        frame is redone whole, its shards rewritten whole (bit-identical: every chain's result
        depends on the chain only).

    Returns
    -------
    list of TaskSpec
        In frame order, numbered from 0.
    """
    status = np.asarray(status)
    n_frames = int(status.shape[0])
    if shard_frames < 1 or (chain_frames % shard_frames and shard_frames % chain_frames):
        raise ConfigError(f"shard_frames ({shard_frames}) must be a divisor or a multiple of "
                          f"chain_frames ({chain_frames})")
    block = max(chain_frames, shard_frames)
    per_task = chains_per_task(frames_per_task, block)
    n_blocks = math.ceil(n_frames / block)
    padded = np.full(n_blocks * block, 1 + STATUS_PENDING, dtype=np.int64)
    padded[:n_frames] = status
    pending = (padded.reshape(n_blocks, block) == STATUS_PENDING).any(axis=1)
    tasks: list[TaskSpec] = []
    group: list[int] = []

    def close() -> None:
        if group:
            tasks.append(TaskSpec(index=len(tasks), start=group[0] * block,
                                  stop=min((group[-1] + 1) * block, n_frames)))
            group.clear()

    for index in range(n_blocks):
        if not pending[index]:
            close()
            continue
        group.append(index)
        if len(group) == per_task:
            close()
    close()
    return tasks
