"""Read where a job's store stands — safe while a run is writing it, or after a crash."""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.errors import InputFileError
from volrecon.io.zarr_groups import group_attributes
from volrecon.pipeline.lock import StoreLock, read_lock
from volrecon.pipeline.store import (
    STATUS_FAILED,
    STATUS_PENDING,
    STORE_ATTRIBUTE,
    JobStore,
    creation_interrupted,
    is_job_store,
)

__all__ = ["StoreStatus", "format_duration", "format_last_verify", "format_lost_workers",
           "format_status", "store_status"]


@dataclass(frozen=True)
class StoreStatus:
    """A snapshot of a job's output store.

    Attributes
    ----------
    path : Path
        The store.
    total, done, failed : int
        Frames of the job; finished (done or failed); failed.
    failures : dict of int to str
        Reason of each failed frame.
    running : bool
        A live process holds the store's lock.
    holder : dict or None
        That process's pid, host and start time (or a dead holder's, if not ``running``).
    frames_per_second : float
        Throughput of the current run (or of the last one).
    seconds_left : float
        Seconds until the current run is done at that throughput (``nan`` if not running).
    runs : list of dict
        Every run's record (start, end, outcome, scheduler, …).
    last_verify : dict or None
        What the last ``volrecon verify`` found (when, frames, damaged frames), if one ran.
    solve_seconds : float
        Solve seconds summed over the finished frames (``diagnostics/seconds``; each chain's
        unstored lead-in solves are counted on its first stored frame).
    layout : str
        How the store is laid out: format, resolution levels, element type, frames per file.
    """

    path: Path
    total: int
    done: int
    failed: int
    failures: dict[int, str] = field(default_factory=dict)
    running: bool = False
    holder: dict[str, Any] | None = None
    frames_per_second: float = float("nan")
    seconds_left: float = float("nan")
    runs: list[dict[str, Any]] = field(default_factory=list)
    last_verify: dict[str, Any] | None = None
    solve_seconds: float = 0.0
    layout: str = ""

    @property
    def pending(self) -> int:
        """Frames not finished yet."""
        return self.total - self.done

    @property
    def state(self) -> str:
        """``"running"``, ``"complete"`` or ``"stopped"``."""
        if self.running:
            return "running"
        return "complete" if self.done == self.total else "stopped"


def store_status(path: str | os.PathLike[str]) -> StoreStatus:
    """Count done, failed and pending frames of a job's store, without taking its lock.

    Raises
    ------
    InputFileError
        If `path` is not a volrecon output store.
    """
    path = Path(path)
    if not is_job_store(path):
        raise InputFileError(
            f"{path}: not a volrecon output store; give the [output] path of a job"
        )
    running = StoreLock.holder_alive(path)
    holder = read_lock(path)
    try:
        store = JobStore.open(path, mode="r")
    except InputFileError:
        if not creation_interrupted(path):
            raise
        # Killed while creating the store: nothing is done yet. (creation_interrupted found
        # the attribute to be a table.)
        attributes = (group_attributes(path) or {}).get(STORE_ATTRIBUTE, {})
        total = int(attributes.get("video", {}).get("n_frames", 0))
        return StoreStatus(path=path, total=total, done=0, failed=0, running=running,
                           holder=holder)
    status = store.committed_status()  # with frames running tasks have committed
    last_verify = store.attributes.get("last_verify")
    done = int(np.count_nonzero(status != STATUS_PENDING))
    failed = int(np.count_nonzero(status == STATUS_FAILED))
    runs = list(store.attributes.get("runs", []))
    rate, seconds_left = float("nan"), float("nan")
    if runs:
        last = runs[-1]
        before = int(last.get("frames_done_before", 0))
        start = float(last.get("started_epoch_s", 0.0))
        if running and last.get("outcome") == "running":
            elapsed = time.time() - start
            rate = (done - before) / elapsed if elapsed > 0 else float("nan")
            seconds_left = (len(status) - done) / rate if rate > 0 else float("inf")
        elif "ended_epoch_s" in last:
            elapsed = float(last["ended_epoch_s"]) - start
            computed = int(last.get("frames_done_after", before)) - before
            rate = computed / elapsed if elapsed > 0 and computed > 0 else float("nan")
    seconds = np.asarray(store.diagnostics_arrays()["seconds"][:], dtype=np.float64)
    return StoreStatus(path=path, total=len(status), done=done, failed=failed,
                       failures=store.failures(), running=running, holder=holder,
                       frames_per_second=rate, seconds_left=seconds_left, runs=runs,
                       last_verify=last_verify if isinstance(last_verify, dict) else None,
                       solve_seconds=float(np.nansum(seconds[status != STATUS_PENDING])),
                       layout=_layout(store))


def _layout(store: JobStore) -> str:
    """One line on the store's layout, e.g. ``format 3, 2 resolution levels, float32, 32
    frames per file``."""
    levels = 1 + sum(1 for key in store.frame_arrays() if key.isdigit() and key != "0")
    frames = store.shard_frames
    return (f"format {store.attributes.get('format_version')}, {levels} resolution "
            f"level{'s' if levels > 1 else ''}, {store.image.dtype}, "
            + (f"{frames} frames per file" if frames > 1 else "one file per chunk"))


def format_status(status: StoreStatus, *, max_failures: int = 20) -> list[str]:
    """Lines for ``volrecon status``: first ``<done>/<total>``, then state, failures, speed."""
    lines = [f"{status.done}/{status.total}"]
    holder = status.holder or {}
    if status.running:
        lines.append(f"state: running (pid {holder.get('pid')} on {holder.get('host')}, "
                     f"since {holder.get('started')})")
    elif status.state == "complete":
        lines.append("state: complete")
    else:
        lines.append(f"state: stopped, {status.pending} frames pending; run the job again to "
                     "continue")
    lines.append(f"failed: {status.failed} frames")
    for t, reason in list(sorted(status.failures.items()))[:max_failures]:
        lines.append(f"  frame {t}: {reason}")
    if len(status.failures) > max_failures:
        lines.append(f"  … and {len(status.failures) - max_failures} more")
    if np.isfinite(status.frames_per_second):
        which = "current run" if status.running else "last run"
        lines.append(f"throughput: {status.frames_per_second:.3g} frames/s ({which})")
    if status.running and np.isfinite(status.seconds_left):
        lines.append(f"time left: {format_duration(status.seconds_left)}")
    if status.done:
        total = status.solve_seconds
        shown = f"{total:.3g} s" if total < 60 else format_duration(total)
        lines.append(f"solve time: {shown} summed over the {status.done} finished frames "
                     f"({total / status.done:.3g} s per frame in one worker; each chain's "
                     "lead-in solves are counted on its first frame)")
    if status.runs and status.runs[-1].get("lost_worker_count"):
        which = "current run" if status.running else "last run"
        lines.append(format_lost_workers(status.runs[-1], which=which))
    if status.last_verify is not None:
        lines.append(format_last_verify(status.last_verify))
    if status.layout:
        lines.append(f"layout: {status.layout}")
    return lines


def format_lost_workers(run: dict[str, Any], *, which: str = "last run",
                        max_workers: int = 5) -> str:
    """``lost dask workers: <n> in the <which> (<address> pid <pid> at <time>, …)``."""
    count = int(run.get("lost_worker_count", 0))
    listed = run.get("lost_workers", [])
    shown = [f"{w.get('address')} pid {w.get('pid')} at {w.get('lost')}"
             for w in listed[:max_workers]]
    more = ", …" if count > len(shown) else ""
    return f"lost dask workers: {count} in the {which} ({', '.join(shown)}{more})"


def format_last_verify(record: dict[str, Any], *, max_frames: int = 10) -> str:
    """``last verify: <when>, frames a:b, <n> finished frames read: <finding>``."""
    start, stop = [*record.get("frames", []), "?", "?"][:2]
    damaged = int(record.get("damaged", 0))
    found = "all intact"
    if damaged:
        shown = [str(t) for t in record.get("damaged_frames", [])[:max_frames]]
        more = ", …" if damaged > len(shown) else ""
        found = (f"{damaged} damaged (frames {', '.join(shown)}{more}), marked pending to be "
                 "recomputed by the next run")
    if not record.get("checksums", True):
        found += " (format 1 store: chunks carry no checksums)"
    return (f"last verify: {record.get('ended', '?')}, frames {start}:{stop}, "
            f"{record.get('checked', 0)} finished frames read: {found}")


def format_duration(seconds: float) -> str:
    """``"2 h 05 min"``, ``"3 min 20 s"``, ``"12 s"``; ``"unknown"`` if not finite."""
    if not math.isfinite(seconds):
        return "unknown"
    hours, rest = divmod(round(seconds), 3600)
    minutes, secs = divmod(rest, 60)
    if hours:
        return f"{hours} h {minutes:02d} min"
    if minutes:
        return f"{minutes} min {secs:02d} s"
    return f"{secs} s"
