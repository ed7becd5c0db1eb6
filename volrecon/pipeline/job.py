"""Run a job: validate everything, take the store's lock, compute what is missing, record it.

Order of work, so that a bad job never touches an existing store:

1. :func:`prepare_job` loads the model, opens the video and the calibration images, checks the
   frame range and the frame/model shapes, checks a few sampled frames (offset against the
   dark, hot pixels), and fingerprints the inputs;
2. the lock beside the store is taken (a live second writer is refused, a stale lock is
   taken over);
3. the store is created, or opened and its recorded settings compared (refused when they
   differ, unless ``restart``, which only now deletes the old store);
4. tasks are planned from the frames still pending and run; each finished task's frames are
   marked done after their volumes are written;
5. the run's record (start, end, outcome, frames) is appended to the store's provenance.
"""

from __future__ import annotations

import errno
import logging
import os
import platform
import socket
import threading
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import (
    ConfigError,
    HotPixelWarning,
    InputFileError,
    OutputWriteError,
    ShapeError,
    StoreMismatchError,
    VolreconError,
    VolreconWarning,
)
from volrecon.io.checks import check_offset, find_hot_pixels, sample_frames
from volrecon.io.correct import FrameCorrection
from volrecon.io.fingerprint import fingerprint_file, fingerprint_frames, fingerprint_tree
from volrecon.io.frames import FrameSource, open_frames, read_image
from volrecon.pipeline.config import JobConfig, load_job
from volrecon.pipeline.execute import execute_tasks, fft_threads_per_task
from volrecon.pipeline.journal import journal_paths, read_journal
from volrecon.pipeline.lock import StoreLock
from volrecon.pipeline.plan import plan_tasks
from volrecon.pipeline.store import (
    STATUS_FAILED,
    STATUS_PENDING,
    FrameRecords,
    JobStore,
    creation_interrupted,
    is_job_store,
    is_vacant,
)
from volrecon.pipeline.task import TaskContext

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel
    from volrecon.pipeline.execute import LostWorker

__all__ = ["JobProgress", "JobResult", "PreparedJob", "prepare_job", "run_job"]

logger = logging.getLogger(__name__)

#: Lost dask workers listed one by one in a run's record (all are counted).
LOST_WORKERS_LISTED = 100

#: Seconds between looks at the running tasks' journals for progress.
PROGRESS_POLL_S = 1.0


@dataclass(frozen=True, eq=False)
class PreparedJob:
    """A job whose inputs were opened and checked (nothing written yet).

    Attributes
    ----------
    job : JobConfig
    model : PSFModel
        The loaded model (on the CPU).
    source : FrameSource
        The raw video.
    correction : FrameCorrection
        Dark, hot pixels to repair, flat and binning.
    first_frame, n_frames : int
        Video frames ``first_frame : first_frame + n_frames`` are reconstructed.
    fingerprints : dict of str to str
        ``"model.path"``, ``"video.path"`` and, if given, ``"video.dark"``/``"video.flat"``.
    hot_pixels_yx : ndarray of shape (H, 2), int64
        Hot pixels found in the sampled frames (raw grid), repaired or not.
    """

    job: JobConfig
    model: PSFModel
    source: FrameSource
    correction: FrameCorrection
    first_frame: int
    n_frames: int
    fingerprints: dict[str, str]
    hot_pixels_yx: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), np.int64))


@dataclass(frozen=True)
class JobProgress:
    """Where a run stands, passed to the progress callback as frames are committed.

    Attributes
    ----------
    done : int
        Frames finished (done or failed), this run and earlier ones.
    done_at_start : int
        Frames that were finished when this run started.
    total : int
        Frames of the job.
    failed : int
        Frames that failed.
    computed : int
        Frames finished by this run.
    elapsed_s : float
        Seconds since this run started computing.
    frames_per_second : float
        This run's throughput.
    seconds_left : float
        Seconds left at this throughput (``inf`` before the first frame is committed).
    """

    done: int
    done_at_start: int
    total: int
    failed: int
    computed: int
    elapsed_s: float
    frames_per_second: float
    seconds_left: float


@dataclass(frozen=True)
class JobResult:
    """What a finished (or stopped) run left in the store.

    Attributes
    ----------
    store_path : Path
    total, done, failed, computed : int
        See :class:`JobProgress`.
    seconds : float
        Wall-clock time of the run.
    """

    store_path: Path
    total: int
    done: int
    failed: int
    computed: int
    seconds: float

    @property
    def complete(self) -> bool:
        """True when every frame is done or failed."""
        return self.done == self.total


def prepare_job(job: JobConfig) -> PreparedJob:
    """Open and check every input of `job` without writing anything.

    Raises
    ------
    ModelStoreError
        If the model store cannot be loaded.
    InputFileError
        If the video or a calibration image is missing, unreadable or truncated.
    ShapeError
        If the (binned) frames do not match the model's sensor shape or the calibration
        images the frames.
    ConfigError
        If the frame range is outside the video.
    DataError
        If the sampled frames lie mostly below the dark frame (a dark of other camera
        settings).
    BackendError
        If ``device = "gpu"`` and no GPU can be used.
    OutputWriteError
        If the output path lies below a regular file.

    Warns
    -----
    FrameOffsetWarning
        If the offset looks subtracted twice, too high, or not subtracted (no dark for a
        camera with an offset); see :func:`volrecon.io.checks.check_offset`.
    HotPixelWarning
        If the sampled frames hold hot pixels and ``[video] hot_pixels = "keep"``.
    """
    from volrecon.backend import get_backend
    from volrecon.models.base import PSFModel

    model = PSFModel.load(job.model_path)
    if job.solver.method == "admm" and not model.shift_invariant:
        raise ConfigError(
            f"{job.source}: key 'solver.method' is \"admm\", which needs a shift-invariant "
            f"model; {job.model_path} is a {model.kind} model: set method = \"fista\" or "
            "\"rl\""
        )
    source = open_frames(job.video_path, component=job.video_component)
    dark = read_image(job.dark_path, key="[video] dark") if job.dark_path is not None else None
    flat = read_image(job.flat_path, key="[video] flat") if job.flat_path is not None else None
    correction = FrameCorrection.build(dark_yx=dark, flat_yx=flat, binning=job.binning,
                                       name_dark=str(job.dark_path),
                                       name_flat=str(job.flat_path))
    raw_shape = source.shape[1:]
    correction.check_shape(raw_shape, where=source.description)
    corrected = correction.output_shape(raw_shape)
    if corrected != tuple(model.shape_out):
        raise ShapeError(
            f"{source.description}: frames of {raw_shape} pixels"
            + (f" (binned by {job.binning}: {corrected})" if job.binning > 1 else "")
            + f" do not match the model {job.model_path}, which expects {tuple(model.shape_out)}"
            + f"; {_binning_hint(raw_shape, tuple(model.shape_out), job.binning)}"
        )
    if job.frames is None:
        first, n_frames = 0, source.n_frames
    else:
        first, stop = job.frames
        if stop > source.n_frames:
            raise ConfigError(
                f"{job.source}: key 'video.frames' asks for frames up to {stop} but "
                f"{source.description} has {source.n_frames}; use stop <= {source.n_frames}"
            )
        n_frames = stop - first
    correction, hot = _check_frames(job, source, correction, first, n_frames)
    if job.compute.device != "cpu":
        get_backend(job.compute.device)
    _check_output_location(job)
    fingerprints = {"model.path": fingerprint_tree(job.model_path),
                    "video.path": fingerprint_frames(source)}
    if job.dark_path is not None:
        fingerprints["video.dark"] = fingerprint_file(job.dark_path)
    if job.flat_path is not None:
        fingerprints["video.flat"] = fingerprint_file(job.flat_path)
    return PreparedJob(job=job, model=model, source=source, correction=correction,
                       first_frame=first, n_frames=n_frames, fingerprints=fingerprints,
                       hot_pixels_yx=hot)


def _check_frames(job: JobConfig, source: FrameSource, correction: FrameCorrection,
                  first: int, n_frames: int) -> tuple[FrameCorrection, np.ndarray]:
    """Check a few frames spread over the job's range before any work (offset, hot pixels);
    returns the correction (repairing the hot pixels if asked) and the hot pixels found."""
    frames = sample_frames(source, first, n_frames)
    check_offset(frames, correction.dark_yx, video=source.description,
                 dark=None if job.dark_path is None else str(job.dark_path))
    hot = find_hot_pixels(frames, dark_yx=correction.dark_yx)
    if len(hot) and job.hot_pixels == "repair":
        logger.info("%s: repairing %d hot pixels", source.description, len(hot))
        return correction.with_hot_pixels(hot), hot
    if len(hot):
        y, x = (int(v) for v in hot[0])
        warnings.warn(
            f"{source.description}: {len(hot)} hot pixel{'s' if len(hot) > 1 else ''} (fixed "
            f"single-pixel spikes far above all neighbours, first at y={y}, x={x}) stay in "
            "every frame and each becomes a false bright spot in the volumes; set [video] "
            "hot_pixels = \"repair\" (median of the 8 neighbours)"
            + (" or give a [video] dark" if job.dark_path is None else ""),
            HotPixelWarning, stacklevel=3)
    return correction, hot


def _check_output_location(job: JobConfig) -> None:
    """Refuse an output path below a regular file before anything is written."""
    ancestor = job.output_path.parent
    while not ancestor.exists() and ancestor != ancestor.parent:
        ancestor = ancestor.parent
    if ancestor.exists() and not ancestor.is_dir():
        raise OutputWriteError(
            f"{job.source}: key 'output.path' is {job.output_path}, but {ancestor} is a file, "
            "not a folder; choose another [output] path"
        )


#: errno values of a failed write to the output store, and what to do about each.
_WRITE_FIXES = {
    errno.ENOSPC: "free disk space, then run the same command again to continue",
    errno.EDQUOT: "free space within your quota, then run the same command again to continue",
    errno.EFBIG: "choose an [output] path on a file system that allows larger files",
    errno.EROFS: "the file system is read-only; choose another [output] path",
    errno.EACCES: "the folder is not writable for you; choose another [output] path",
    errno.EPERM: "the folder is not writable for you; choose another [output] path",
    errno.ENOTDIR: "part of the path is a file, not a folder; choose another [output] path",
    errno.EEXIST: "part of the path is a file, not a folder; choose another [output] path",
    errno.EIO: "the disk reported an I/O error; check it, then run the same command again",
}


def _write_error(job: JobConfig, exc: OSError) -> OutputWriteError:
    reason = exc.strerror or str(exc)
    fix = _WRITE_FIXES.get(exc.errno or 0, "check the disk, then run the same command again")
    return OutputWriteError(f"{job.output_path}: cannot write the output store ({reason}); "
                            f"{fix}")


def _binning_hint(raw: tuple[int, ...], model: tuple[int, ...], binning: int) -> str:
    ratios = {raw[0] / model[0], raw[1] / model[1]}
    if len(ratios) == 1:
        ratio = ratios.pop()
        if ratio == int(ratio) and int(ratio) != binning and ratio >= 1:
            return f"set [video] binning = {int(ratio)}"
    return "use a model calibrated for this camera and binning"


def run_job(job: JobConfig | str | os.PathLike[str], *, restart: bool = False,
            progress: Callable[[JobProgress], None] | None = None,
            client: Any = None) -> JobResult:
    """Reconstruct every pending frame of a job into its OME-Zarr store.

    Parameters
    ----------
    job : JobConfig or path
        A job, or the path of its TOML file.
    restart : bool
        Delete an existing store of this job and start over (only after the new job has been
        checked, and only if the path holds a volrecon output store).
    progress : callable, optional
        Called with a :class:`JobProgress` at the start, after each frame the tasks commit
        (looked for every :data:`PROGRESS_POLL_S` seconds, in a thread of the run) and after
        each finished task; never two calls at once.
    client : distributed.Client, optional
        Run on this dask.distributed client (e.g. of a dask-jobqueue cluster) instead of
        ``[compute] scheduler``.

    Returns
    -------
    JobResult

    Raises
    ------
    ConfigError, InputFileError, ModelStoreError, ShapeError, BackendError
        For a bad job (see :func:`prepare_job`); nothing is written then.
    StoreLockedError
        If another live process is writing the store.
    StoreMismatchError
        If the store was written with other settings and `restart` is false.
    InputFileError
        Also if the existing store is damaged (missing or unreadable metadata or status) or
        of another format version; it is left as it is.
    OutputWriteError
        If the store cannot be written (disk full, read-only); frames already marked done
        stay valid and the next run continues.
    KeyboardInterrupt
        On Ctrl-C; every frame committed so far is recorded (a task stops after the frame it
        is solving), the store stays consistent and the next run continues it.

    Notes
    -----
    Results do not depend on ``[compute]``, on the task size or on where a job was stopped:
    the resumed store is bit-identical to an uninterrupted one.
    """
    if not isinstance(job, JobConfig):
        job = load_job(job)
    prepared = prepare_job(job)
    try:
        lock = StoreLock(job.output_path).acquire()
        try:
            store = _open_store(prepared, restart=restart)
            return _run(prepared, store, progress=progress, client=client)
        finally:
            lock.release()
    except OSError as exc:
        # Store writes that fail (disk full, read-only) become one clear line; errors volrecon
        # raised itself and other OS errors (a bug, a lost cluster connection) pass unchanged.
        if isinstance(exc, VolreconError) or exc.errno not in _WRITE_FIXES:
            raise
        raise _write_error(job, exc) from exc


def _open_store(prepared: PreparedJob, *, restart: bool) -> JobStore:
    job = prepared.job
    path = job.output_path
    comparable = job.comparable_settings(prepared.fingerprints)
    # The range actually reconstructed, so that "all frames" and [0, T] compare equal.
    comparable["video"]["frames"] = [prepared.first_frame,
                                     prepared.first_frame + prepared.n_frames]
    if restart:
        JobStore.wipe(path)
    elif path.exists() and is_job_store(path):
        try:
            store = JobStore.open(path)
        except InputFileError:
            if not creation_interrupted(path):
                raise  # damaged, or another format: never deleted without --restart
            logger.warning("%s: its creation was interrupted; creating it again", path)
            JobStore.wipe(path)
        else:
            store.check_settings(comparable, job_source=job.source)
            _warn_on_other_version(store)
            expected = (prepared.n_frames, *prepared.model.shape_in)
            if tuple(store.image.shape) != expected:
                raise StoreMismatchError(
                    f"{path}: image has shape {tuple(store.image.shape)} but this job makes "
                    f"{expected}; re-run with --restart to start over"
                )
            return store
    elif path.exists() and not (path.is_dir() and is_vacant(path)):
        raise ConfigError(
            f"{path}: exists and is not a volrecon output store; choose another [output] path"
        )
    return _create_store(prepared, comparable)


def _warn_on_other_version(store: JobStore) -> None:
    from volrecon import __version__

    written_by = store.attributes.get("provenance", {}).get("volrecon_version")
    if written_by != __version__:
        warnings.warn(f"{store.path}: written by volrecon {written_by}, continued by "
                      f"{__version__}; frames computed now may differ from earlier ones in "
                      "the last bits", VolreconWarning, stacklevel=2)


def _create_store(prepared: PreparedJob, comparable: dict[str, Any]) -> JobStore:
    from importlib.metadata import version

    import zarr

    from volrecon import __version__

    job, model = prepared.job, prepared.model
    geometry = model.geometry
    metadata = {
        "settings": job.settings(),
        "comparable_settings": comparable,
        "fingerprints": prepared.fingerprints,
        "video": {"path": os.fspath(job.video_path), "first_frame": prepared.first_frame,
                  "n_frames": prepared.n_frames,
                  "frame_shape_yx": list(prepared.source.shape[1:]),
                  "hot_pixels_yx": prepared.hot_pixels_yx.tolist(),
                  "hot_pixels": job.hot_pixels,
                  "dtype": prepared.source.dtype.name},
        "model": {"path": os.fspath(job.model_path), "kind": model.kind,
                  "shape_zyx": list(model.shape_in),
                  "depth_step_um": geometry.depth_step_um,
                  "pixel_size_um": geometry.pixel_size_um,
                  "depth_start_um": geometry.depth_start_um},
        "provenance": {"volrecon_version": __version__, "created": _now(),
                       "job_file": job.source, "python": platform.python_version(),
                       "numpy": np.__version__, "zarr": zarr.__version__,
                       "dask": version("dask")},
        "runs": [],
    }
    return JobStore.create(
        job.output_path, shape_zyx=model.shape_in, n_frames=prepared.n_frames,
        scale_tzyx=(job.time_interval_s, geometry.depth_step_um, geometry.pixel_size_um,
                    geometry.pixel_size_um),
        depth_start_um=geometry.depth_start_um, metadata=metadata,
        projections=job.max_projections, compression_level=job.compression_level,
        shard_frames=job.shard_frames, levels=job.level_count(model.shape_in),
        dtype=job.dtype)


def _run(prepared: PreparedJob, store: JobStore, *,
         progress: Callable[[JobProgress], None] | None, client: Any) -> JobResult:
    job = prepared.job
    started = time.time()
    absorbed = sum(r.stop - r.start for r in store.absorb_journals())
    if absorbed:
        logger.info("%s: recorded %d frames committed by an interrupted run", store.path,
                    absorbed)
    status = store.status()
    removed = store.remove_partial_files()
    if removed:
        logger.info("%s: removed %d partial files of an interrupted write", store.path, removed)
    fft_threads = fft_threads_per_task(job.compute)
    runs = list(store.attributes.get("runs", []))
    tally = _Tally(store, status, progress)
    run_record: dict[str, Any] = {
        "started": _now(), "started_epoch_s": started, "host": socket.gethostname(),
        "pid": os.getpid(), "scheduler": job.compute.scheduler if client is None else "client",
        "workers": job.compute.workers, "frames_per_task": job.compute.frames_per_task,
        "device": job.compute.device, "fft_threads": fft_threads,
        "frames_done_before": tally.done_before, "outcome": "running"}
    store.update_attributes(runs=[*runs, run_record])
    tasks = plan_tasks(status, chain_frames=job.solver.chain_frames,
                       frames_per_task=job.compute.frames_per_task,
                       shard_frames=store.shard_frames)
    context = TaskContext(
        source=prepared.source, first_frame=prepared.first_frame,
        correction=prepared.correction, model_path=os.fspath(job.model_path),
        model_fingerprint=prepared.fingerprints["model.path"], solver=job.solver,
        device=job.compute.device, fft_threads=fft_threads,
        store_path=os.fspath(store.path), projections=job.max_projections)

    def on_lost_worker(lost: LostWorker) -> None:
        # Recorded at once, so that `volrecon status` shows it while the run goes on.
        listed = list(run_record.get("lost_workers", []))
        if len(listed) < LOST_WORKERS_LISTED:
            listed.append(lost.record())
        run_record.update(lost_worker_count=int(run_record.get("lost_worker_count", 0)) + 1,
                          lost_workers=listed)
        store.update_attributes(runs=[*runs, run_record])

    outcome = "error"
    failure: BaseException | None = None
    tally.start()  # the bar (or log line) from the start, then after every committed frame
    try:
        execute_tasks(tasks, context, job.compute, tally.on_result, client=client,
                      on_lost_worker=on_lost_worker)
        outcome = "complete" if tally.done == store.n_frames else "stopped"
        if run_record.get("lost_worker_count"):
            store.remove_partial_files()  # left by workers killed mid-write; all tasks ended
    except BaseException as exc:
        failure = exc
        if isinstance(exc, KeyboardInterrupt):
            outcome = "interrupted"
        raise
    finally:
        tally.stop()
        ended = time.time()
        try:
            if failure is not None:  # keep every frame the stopped tasks committed
                tally.absorb()
            run_record.update(ended=_now(), ended_epoch_s=ended, outcome=outcome,
                              frames_done_after=tally.done, frames_computed=tally.computed)
            store.update_attributes(runs=[*runs, run_record])
        except OSError as exc:
            if failure is None:
                raise
            # The disk that made the run fail often refuses this record too: the first error
            # is the one to report, and the store stays consistent without the record.
            logger.warning("%s: could not record the end of the run (%s)", store.path, exc)
    return JobResult(store_path=store.path, total=tally.total, done=tally.done,
                     failed=tally.failed, computed=tally.computed,
                     seconds=time.time() - started)


class _Tally:
    """A run's counts, recorded and committed, and its progress callback.

    Frames count as they are committed inside tasks (their journals, read every
    :data:`PROGRESS_POLL_S` seconds by a thread of its own), not only when a task ends, so
    progress and time left move from the first frame on; throughput is from wall time.
    """

    def __init__(self, store: JobStore, status: np.ndarray,
                 progress: Callable[[JobProgress], None] | None) -> None:
        self._store = store
        self._status = status  # the driver's copy of the recorded status
        self._progress = progress
        self.total = int(status.shape[0])
        self.done_before = int(np.count_nonzero(status != STATUS_PENDING))
        self._done = self.done_before
        self._failed = int(np.count_nonzero(status == STATUS_FAILED))
        self._computed = 0
        self._journaled = (0, 0, 0)  # committed, not recorded: new, new failed, all
        self._lock = threading.Lock()
        self._quit = threading.Event()
        self._thread: threading.Thread | None = None
        self._started = time.perf_counter()

    @property
    def done(self) -> int:
        return self._done

    @property
    def failed(self) -> int:
        return self._failed

    @property
    def computed(self) -> int:
        return self._computed

    def start(self) -> None:
        """Show the starting point and begin watching the journals."""
        self._started = time.perf_counter()
        if self._progress is None:
            return
        self._emit()
        self._thread = threading.Thread(target=self._watch, name="volrecon-progress",
                                        daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._quit.set()
        if self._thread is not None:
            self._thread.join()

    def on_result(self, records: FrameRecords) -> None:
        """Record a finished task (diagnostics, then status), drop its journal, report."""
        with self._lock:
            self._store.record(records)
            self._store.drop_journal(records.start, records.stop)
            self._count(records)
            self._journaled = self._read_journals()
            self._emit()

    def absorb(self) -> None:
        """Record what stopped tasks committed (after an interrupted or failed run)."""
        with self._lock:
            for records in self._store.absorb_journals():
                self._count(records)
            self._journaled = (0, 0, 0)

    def _count(self, records: FrameRecords) -> None:
        old = self._status[records.start:records.stop]
        self._done += int(np.count_nonzero(old == STATUS_PENDING))
        self._computed += records.stop - records.start
        self._failed += int(np.count_nonzero(records.status == STATUS_FAILED)) - int(
            np.count_nonzero(old == STATUS_FAILED))
        self._status[records.start:records.stop] = records.status

    def _read_journals(self) -> tuple[int, int, int]:
        new = new_failed = every = 0
        for path in journal_paths(self._store.path):
            for entry in read_journal(path):
                t = int(entry["t"])
                if not 0 <= t < self.total:
                    continue
                every += 1
                if self._status[t] == STATUS_PENDING:
                    new += 1
                    new_failed += int(entry["status"]) == STATUS_FAILED
        return new, new_failed, every

    def _watch(self) -> None:
        while not self._quit.wait(PROGRESS_POLL_S):
            with self._lock:
                journaled = self._read_journals()
                if journaled != self._journaled:
                    self._journaled = journaled
                    self._emit()

    def _emit(self) -> None:
        if self._progress is None:
            return
        new, new_failed, every = self._journaled
        done, computed = self._done + new, self._computed + every
        elapsed = time.perf_counter() - self._started
        rate = computed / elapsed if elapsed > 0 and computed else 0.0
        self._progress(JobProgress(
            done=done, done_at_start=self.done_before, total=self.total,
            failed=self._failed + new_failed, computed=computed, elapsed_s=elapsed,
            frames_per_second=rate,
            seconds_left=(self.total - done) / rate if rate > 0 else float("inf")))


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")
