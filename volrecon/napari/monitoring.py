"""What the job monitor shows, read from a store (no napari or Qt needed).

Reading is safe while a run writes the store: it only reads the small diagnostics arrays and
attributes, never the volumes, and takes no lock.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.pipeline.convergence import count_convergence
from volrecon.pipeline.status import StoreStatus, format_duration, format_status, store_status
from volrecon.pipeline.store import STATUS_DONE, STATUS_FAILED, JobStore

if TYPE_CHECKING:
    from pathlib import Path

__all__ = ["JobSnapshot", "format_duration", "plot_series", "read_job_snapshot"]


@dataclass(frozen=True, eq=False)
class JobSnapshot:
    """A job's progress and per-frame diagnostics at one moment.

    Attributes
    ----------
    status : StoreStatus
        Counts, state, throughput and time left (see :func:`volrecon.pipeline.store_status`).
    diagnostics : dict of str to ndarray of shape (T,)
        ``status``, ``iterations``, ``objective``, ``residual``, ``converged``, ``seconds``;
        empty if the store's creation was interrupted.
    """

    status: StoreStatus
    diagnostics: dict[str, np.ndarray]

    @property
    def path(self) -> Path:
        """The store."""
        return self.status.path

    def summary(self) -> list[str]:
        """Short lines for the monitor: counts, state, convergence, throughput, time left."""
        s = self.status
        lines = [f"{s.done} of {s.total} frames finished, {s.failed} failed",
                 f"state: {s.state}"]
        if self.diagnostics:
            convergence = count_convergence(self.diagnostics)
            lines.append(f"converged: {convergence.converged}, at the iteration cap: "
                         f"{convergence.at_cap}")
            if convergence.advice():
                lines.append(f"advice: {convergence.advice()}")
        if math.isfinite(s.frames_per_second):
            lines.append(f"throughput: {s.frames_per_second:.3g} frames/s")
        if s.running:
            lines.append(f"time left: {format_duration(s.seconds_left)}")
        return lines

    def details(self) -> list[str]:
        """The full report of ``volrecon status`` (failures listed)."""
        return format_status(self.status)


def read_job_snapshot(path: str | os.PathLike[str]) -> JobSnapshot:
    """Read a store's progress and diagnostics now.

    Raises
    ------
    InputFileError
        If `path` is not a volrecon output store.
    """
    status = store_status(path)
    try:
        diagnostics = JobStore.open(path, mode="r").diagnostics()
    except OSError:
        diagnostics = {}
    return JobSnapshot(status=status, diagnostics=diagnostics)


def plot_series(diagnostics: dict[str, np.ndarray], name: str, *, max_points: int = 2000
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Points to plot for one diagnostic: finished frames only, binned when there are many.

    Parameters
    ----------
    diagnostics : dict of str to ndarray
        As in :attr:`JobSnapshot.diagnostics`.
    name : str
        ``"iterations"``, ``"residual"``, ``"objective"`` or ``"seconds"``.
    max_points : int
        With more frames than this, frames are grouped into `max_points` equal bins and each
        bin shows the mean over its done frames (so a 10^6-frame job plots quickly).

    Returns
    -------
    frames, values : ndarray
        x (frame index, bin centre when binned) and y of the done frames.
    failed_frames, failed_values : ndarray
        Failed frames, plotted as markers at the bottom of the axis (value NaN).
    """
    if max_points < 1:
        raise ValueError(f"max_points must be at least 1; got {max_points}")
    status = diagnostics["status"]
    values = np.asarray(diagnostics[name], dtype=np.float64)
    done = status == STATUS_DONE
    failed_frames = np.flatnonzero(status == STATUS_FAILED).astype(np.float64)
    n = len(status)
    if n <= max_points:
        frames = np.flatnonzero(done)
        return (frames.astype(np.float64), values[frames], failed_frames,
                np.full(failed_frames.shape, np.nan))
    edges = np.linspace(0, n, max_points + 1).astype(int)
    bins = np.repeat(np.arange(max_points), np.diff(edges))
    counts = np.bincount(bins, weights=done, minlength=max_points)
    sums = np.bincount(bins, weights=np.where(done, values, 0.0), minlength=max_points)
    keep = counts > 0
    centres = (edges[:-1] + edges[1:] - 1) / 2
    return (centres[keep], sums[keep] / counts[keep], failed_frames,
            np.full(failed_frames.shape, np.nan))
