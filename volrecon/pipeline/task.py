"""One task of a job: read a few frames, reconstruct them in order, write their volumes.

Everything a task needs travels in two small frozen objects that pickle (a
:class:`TaskContext` shared by all tasks and a :class:`TaskSpec` per task), so the same
function runs in a thread, a process or on a dask.distributed worker. The PSF model is loaded
from its store inside the worker, once per process.
"""

from __future__ import annotations

import collections
import logging
import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.io.ome_zarr import IMAGE_PATH, downsample_yx
from volrecon.pipeline.config import dask_config_seconds
from volrecon.pipeline.journal import FrameJournal
from volrecon.pipeline.shards import FrameWriter
from volrecon.pipeline.store import (
    PROJECTIONS,
    STATUS_DONE,
    STATUS_FAILED,
    FrameRecords,
    fsync_tree,
    level_paths,
    max_projections,
)
from volrecon.solvers.chain import solve_chain

if TYPE_CHECKING:
    from volrecon.io.correct import FrameCorrection
    from volrecon.io.frames import FrameSource
    from volrecon.models.base import PSFModel
    from volrecon.solvers.settings import SolverSettings

__all__ = ["STOP", "TaskContext", "TaskSpec", "TaskStopped", "run_task"]

logger = logging.getLogger(__name__)

#: Finished volumes queued for a task's writer thread at most; a solver this far ahead
#: waits, so memory stays flat.
WRITE_QUEUE_FRAMES = 4

#: A sharded store's open shard files are rewritten with the frames finished so far when
#: nothing has reached the disk for this long (dask config ``volrecon.shard-flush-interval``,
#: e.g. ``DASK_VOLRECON__SHARD_FLUSH_INTERVAL=30s``), so a kill loses at most about this much
#: work per worker; the complete shard is written again, whole, at its end. Each rewrite costs
#: the shard's bytes so far (16 MB at most for 32 frames of 16×128² float32).
SHARD_FLUSH_INTERVAL = "10s"
#: ... and at most once per this many times the last such rewrite took (large volumes: a
#: shard of 32 frames of 32×512² is ~0.3 GB, so the rewrites stay under 5 % of the time).
FLUSH_SHARE = 20.0

#: Set by the driver on Ctrl-C: tasks running in its own process (threads, synchronous) stop
#: after the frame they are solving, keeping every frame committed so far.
STOP = threading.Event()


class TaskStopped(Exception):
    """A task ended early because :data:`STOP` was set; its committed frames are kept."""


@dataclass(frozen=True)
class TaskSpec:
    """Frames ``start:stop`` of the store, made of whole warm-start chains.

    Attributes
    ----------
    index : int
        Task number (for logs).
    start, stop : int
        Store frame range (store frame ``t`` is video frame ``first_frame + t``).
    """

    index: int
    start: int
    stop: int


@dataclass(frozen=True, eq=False)
class TaskContext:
    """What every task of a job shares.

    Attributes
    ----------
    source : FrameSource
        Raw video reader (picklable).
    first_frame : int
        Video frame of store frame 0.
    correction : FrameCorrection
        Dark, flat and binning.
    model_path : str
        PSF model store; each process loads it once.
    model_fingerprint : str
        Its fingerprint (the cache key, so a changed store is never served from cache).
    solver : SolverSettings
        Arguments of the reconstruction.
    device : str
        "cpu" or "gpu".
    fft_threads : int or None
        FFT threads per task; None: one (a dask.distributed worker with unknown sharing).
    store_path : str
        Output store.
    projections : bool
        Write max projections.
    """

    source: FrameSource
    first_frame: int
    correction: FrameCorrection
    model_path: str
    model_fingerprint: str
    solver: SolverSettings
    device: str
    fft_threads: int | None
    store_path: str
    projections: bool


@lru_cache(maxsize=4)
def _load_model(path: str, fingerprint: str, device: str, threads: int) -> PSFModel:
    """The model at `path` on `device`, loaded once per process and cached by fingerprint."""
    from volrecon.models.base import PSFModel

    del fingerprint  # part of the cache key only
    return PSFModel.load(path).on_device(device, threads=threads)


def run_task(context: TaskContext, spec: TaskSpec) -> FrameRecords:
    """Reconstruct and write frames ``spec.start:spec.stop``; return their diagnostics.

    Each chain of ``context.solver.chain_frames`` frames starts from scratch
    ``lead_in_frames`` before its first frame (never before the job's first frame; the lead-in
    frames are solved, not stored) and warm-starts every later frame from the previous one, so
    a frame's result depends only on its chain, never on task size, scheduler or
    interruptions. A frame that fails (its
    input is not finite, the solver refuses it, the result is not finite or its residual
    exceeds ``max_residual``) is written as NaN, recorded with its reason, and the chain
    restarts at the next frame (:func:`volrecon.solvers.solve_chain`). A volume beyond the
    range of a float16 store fails the same way (its reason names ``[output] dtype``). Each
    stored frame is written to every resolution level (the 2 × 2 lateral mean of the level
    above, :func:`volrecon.io.ome_zarr.downsample_yx`) and, when asked, to the projections.
    The solve seconds of a chain's lead-in frames are added to its first stored frame's, so
    the recorded seconds sum to the task's whole solve time.

    Reading overlaps the solves (the next chain's frames are read and corrected in a thread
    while the current chain solves), and so does writing (a second thread encodes and writes
    the finished volumes in order, at most :data:`WRITE_QUEUE_FRAMES` behind the solver). The
    task returns only after every write has finished, so the driver's record of its frames
    always follows their data.

    Each frame is committed as soon as its files are on disk (fsynced; in a sharded store,
    once its shard file is written: at the shard's end, on a stop, and with the frames so far
    when nothing reached the disk for :data:`SHARD_FLUSH_INTERVAL`): one line in the task's
    journal (:mod:`volrecon.pipeline.journal`), which the driver folds into the diagnostics,
    so Ctrl-C loses only the frames being solved, and a kill at most those and the last
    flush interval's frames of a sharded store.

    Raises
    ------
    InputFileError
        If the raw frames cannot be read.
    TaskStopped
        If :data:`STOP` was set (Ctrl-C in the driver's process): after the frame being
        solved is written and committed.
    """
    import zarr

    solver = context.solver
    threads = context.fft_threads or 1
    model = _load_model(context.model_path, context.model_fingerprint, context.device, threads)
    group: Any = zarr.open_group(zarr.storage.LocalStore(context.store_path), mode="r+")
    writers = {IMAGE_PATH: FrameWriter(context.store_path, group[IMAGE_PATH])}
    levels = level_paths(group, context.store_path)
    writers.update({key: FrameWriter(context.store_path, group[key]) for key in levels})
    largest = _largest_value(group[IMAGE_PATH].dtype)
    if context.projections:
        writers.update({name: FrameWriter(context.store_path, group[f"projections/{name}"])
                        for name in PROJECTIONS})
    n = spec.stop - spec.start
    records: dict[str, np.ndarray] = {
        "iterations": np.zeros(n, np.int32), "objective": np.full(n, np.nan),
        "residual": np.full(n, np.nan), "converged": np.zeros(n, bool),
        "seconds": np.full(n, np.nan, np.float32), "status": np.zeros(n, np.uint8)}
    failures: dict[int, str] = {}
    chains = [(start, min(start + solver.chain_frames, spec.stop), solver.chain_span(start))
              for start in range(spec.start, spec.stop, solver.chain_frames)]

    def read(solve_start: int, chain_stop: int) -> np.ndarray:
        raw = context.source.read(context.first_frame + solve_start,
                                  context.first_frame + chain_stop)
        return context.correction.apply(raw)

    journal = FrameJournal(context.store_path, spec.start, spec.stop)
    waiting: dict[int, dict[str, Any]] = {}  # written to some arrays, not yet committed
    written: collections.Counter[int] = collections.Counter()

    flush_interval = dask_config_seconds("volrecon.shard-flush-interval",
                                         SHARD_FLUSH_INTERVAL)
    last_on_disk = [time.monotonic()]

    def commit(done: list[int]) -> None:
        """Commit every frame that `done` made wholly on disk (all arrays written)."""
        written.update(done)
        ready = sorted(f for f in set(done) if written[f] == len(writers))
        if ready:
            fsync_tree(dict.fromkeys(path for f in ready for w in writers.values()
                                     for path in w.files(f)), Path(context.store_path))
            journal.commit([waiting.pop(f) for f in ready])
            last_on_disk[0] = time.monotonic()

    flush_seconds = [0.0]

    def flush() -> None:
        """Write open shards with the frames they have so far, and commit those."""
        t0 = time.monotonic()
        commit([f for w in writers.values() for f in w.flush()])
        flush_seconds[0] = time.monotonic() - t0

    def write(t: int, volume: np.ndarray, entry: dict[str, Any]) -> None:
        """Write frame `t` everywhere, then commit every frame now wholly on disk."""
        waiting[t] = entry
        done = writers[IMAGE_PATH].write(t, volume)
        level = volume
        for key in levels:
            level = downsample_yx(level)
            done += writers[key].write(t, level)
        if context.projections:
            for name, projected in max_projections(volume).items():
                done += writers[name].write(t, projected)
        commit(done)
        # At most every flush interval, and never more than 1/FLUSH_SHARE of the time.
        if time.monotonic() - last_on_disk[0] >= max(flush_interval,
                                                     FLUSH_SHARE * flush_seconds[0]):
            flush()

    # One thread reads (and corrects) the next chain's frames while this one solves, another
    # encodes and writes the finished frames in order; at most WRITE_QUEUE_FRAMES volumes wait
    # for it, so memory stays flat. The task returns only once every write is done.
    reader = ThreadPoolExecutor(1, thread_name_prefix="volrecon-read")
    writer = ThreadPoolExecutor(1, thread_name_prefix="volrecon-write")
    writes: collections.deque[Future[None]] = collections.deque()
    try:
        upcoming = reader.submit(read, chains[0][2], chains[0][1])
        for k, (chain_start, _, solve_start) in enumerate(chains):
            frames = upcoming.result()
            if k + 1 < len(chains):
                upcoming = reader.submit(read, chains[k + 1][2], chains[k + 1][1])
            lead_in_seconds = 0.0
            for offset, result in enumerate(solve_chain(frames, model, solver)):
                t = solve_start + offset
                info = result.info
                if t < chain_start:  # lead-in: only its state (and its time) goes on
                    lead_in_seconds += info.seconds if info is not None else 0.0
                    continue
                i = t - spec.start
                failure = result.failure or ("no volume" if result.volume is None else None)
                if failure is None and result.volume is not None and largest is not None:
                    peak = float(np.abs(result.volume).max())
                    if peak > largest:
                        failure = (f"values up to {peak:.4g} exceed the store's "
                                   f"{group[IMAGE_PATH].dtype} range ({largest:.6g}); set "
                                   "[output] dtype = \"float32\" (or scale the frames down)")
                if failure is None and result.volume is not None:
                    volume = result.volume
                    records["status"][i] = STATUS_DONE
                else:
                    volume = np.full(model.shape_in, np.nan, dtype=np.float32)
                    records["status"][i] = STATUS_FAILED
                    failures[t] = failure or "no volume"
                    logger.warning("frame %d (video frame %d): %s", t,
                                   context.first_frame + t, failure)
                if info is not None:
                    records["iterations"][i] = info.iterations
                    records["objective"][i] = info.objective
                    records["residual"][i] = info.residual
                    records["converged"][i] = info.converged
                    records["seconds"][i] = info.seconds
                if t == chain_start and lead_in_seconds > 0:  # on the chain's first frame
                    records["seconds"][i] = lead_in_seconds + np.nan_to_num(
                        records["seconds"][i])
                entry = {"t": t, "failure": failures.get(t),
                         **{name: values[i] for name, values in records.items()}}
                writes.append(writer.submit(write, t, volume, entry))
                while len(writes) > WRITE_QUEUE_FRAMES:
                    writes.popleft().result()
                if STOP.is_set():
                    break
            if STOP.is_set():
                writes.append(writer.submit(flush))  # keep the open shards' frames
                break
        while writes:
            writes.popleft().result()
    finally:
        reader.shutdown(wait=True, cancel_futures=True)
        writer.shutdown(wait=True, cancel_futures=True)
        journal.close()
    if STOP.is_set():
        raise TaskStopped(f"task {spec.index} stopped on request")
    for frame_writer in writers.values():
        frame_writer.check_written()
    return FrameRecords(start=spec.start, stop=spec.stop, failures=failures, **records)


def _largest_value(dtype: Any) -> float | None:
    """Largest finite value of a store's element type, when below float32's (float16)."""
    info = np.finfo(dtype)
    return float(info.max) if info.max < np.finfo(np.float32).max else None
