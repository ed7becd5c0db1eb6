"""Run a job's tasks on a dask scheduler and hand each finished task's records to the driver.

Local schedulers (``threads``, ``processes``, ``synchronous``) get the tasks in waves, each a
small dask graph, so a million-frame job never builds a million-task graph; a dask callback
reports every finished task in the driver's thread. dask.distributed (a ``LocalCluster`` or a
``tcp://`` scheduler) gets a sliding window of futures. In both cases at most a few tasks per
worker are in flight, so memory does not grow with the length of the video.

On dask.distributed a worker may be lost mid-task (SIGKILL, a crash, a node gone): the
scheduler runs its tasks again elsewhere, which is safe because a task rewrites its frames
whole; the driver notices the loss and reports it. A run stops with one clear error only when
no worker is left for a while, or when workers keep dying while running the same task.
"""

from __future__ import annotations

import collections
import contextlib
import itertools
import logging
import multiprocessing
import os
import time
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError, Executor, ProcessPoolExecutor, ThreadPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from volrecon.backend import split_threads
from volrecon.errors import ConfigError, WorkersLostError
from volrecon.pipeline.config import dask_config_seconds
from volrecon.pipeline.store import FrameRecords
from volrecon.pipeline.task import STOP, run_task

if TYPE_CHECKING:
    from volrecon.pipeline.config import ComputeSettings
    from volrecon.pipeline.task import TaskContext, TaskSpec

__all__ = ["LostWorker", "execute_tasks", "fft_threads_per_task", "no_workers_timeout_s",
           "open_client", "open_local_scheduler"]

logger = logging.getLogger(__name__)

#: Tasks per wave on the local schedulers, per worker: graphs stay small, and the idle tail
#: at the end of a wave (at most one task per worker) stays a small fraction of it.
WAVE_TASKS_PER_WORKER = 64
#: Futures in flight on dask.distributed, per worker thread.
WINDOW_TASKS_PER_THREAD = 2
#: Seconds between looks at a dask.distributed cluster's workers while tasks run.
WORKER_POLL_S = 1.0
#: Seconds a new scatter of the tasks' shared context waits for a worker.
SCATTER_TIMEOUT_S = 10.0
#: How long a distributed run that lost workers waits with none left before it stops with
#: :class:`~volrecon.errors.WorkersLostError` (dask config ``volrecon.no-workers-timeout``,
#: e.g. ``DASK_VOLRECON__NO_WORKERS_TIMEOUT=5m``). A LocalCluster's nanny restarts a killed
#: worker within seconds, and a batch queue may take minutes to start new ones.
NO_WORKERS_TIMEOUT = "60s"


def fft_threads_per_task(compute: ComputeSettings) -> int | None:
    """FFT threads each task uses: the one place where workers × threads ≤ cores is decided.

    ``[compute] threads`` wins when set. Otherwise local schedulers and a LocalCluster split
    this machine's cores among `workers` (:func:`volrecon.backend.split_threads`); on a remote
    dask.distributed cluster the node's cores are unknown here, so each task uses one thread
    (set ``threads`` when workers have spare cores).
    """
    if compute.threads is not None:
        return compute.threads
    if compute.scheduler == "synchronous":
        return split_threads(1)
    if compute.is_distributed and compute.scheduler != "local-cluster":
        return None
    return split_threads(compute.workers)


def execute_tasks(tasks: Sequence[TaskSpec], context: TaskContext, compute: ComputeSettings,
                  on_result: Callable[[FrameRecords], None], *, client: Any = None,
                  on_lost_worker: Callable[[LostWorker], None] | None = None) -> None:
    """Run `tasks` and call `on_result` in this thread as each one finishes.

    Parameters
    ----------
    tasks : sequence of TaskSpec
        Independent tasks (any order of completion is fine).
    context : TaskContext
        Shared by all tasks.
    compute : ComputeSettings
        Scheduler and workers.
    on_result : callable
        Called with each task's :class:`FrameRecords`, in the calling thread.
    client : distributed.Client, optional
        Use this client (e.g. one connected to a dask-jobqueue cluster) instead of
        ``compute.scheduler``; it is left open.
    on_lost_worker : callable, optional
        Called with a :class:`LostWorker`, in the calling thread, for each dask.distributed
        worker that leaves the cluster without being retired (killed, crashed, cut off). Its
        tasks run again on the others (a task rewrites its frames whole, so a second run of
        it writes the same bits); a LocalCluster's nanny starts a replacement.

    Raises
    ------
    Exception
        The first error a task raises (input file unreadable, store not writable …); tasks
        still running are cancelled or awaited, never recorded.
    WorkersLostError
        On dask.distributed, when workers were lost and none was left for
        :func:`no_workers_timeout_s` seconds, or when workers died while running one task more
        often than ``distributed.scheduler.allowed-failures`` (default 3) allows.
    KeyboardInterrupt
        On Ctrl-C, after in-flight local tasks have stopped.
    """
    if not tasks:
        return
    if client is not None or compute.is_distributed:
        _execute_distributed(tasks, context, compute, on_result, on_lost_worker, client)
    else:
        _execute_local(tasks, context, compute, on_result)


# ---------------------------------------------------------------------------------- local
def _execute_local(tasks: Sequence[TaskSpec], context: TaskContext, compute: ComputeSettings,
                   on_result: Callable[[FrameRecords], None]) -> None:
    from dask.base import compute as dask_compute
    from dask.delayed import delayed

    def posttask(key: Any, result: Any, dsk: Any, state: Any, worker_id: Any) -> None:
        if isinstance(result, FrameRecords):
            on_result(result)

    wave = max(1, WAVE_TASKS_PER_WORKER * compute.workers)
    shared = delayed(context, pure=False)
    # Passed to this computation only (not registered globally): (start, start_state,
    # pretask, posttask, finish), the form dask.local.get_async takes.
    callbacks = [(None, None, None, posttask, None)]
    STOP.clear()
    try:
        with open_local_scheduler(compute, name="volrecon-task") as kwargs:
            try:
                for first in range(0, len(tasks), wave):
                    graph = [delayed(run_task, pure=False)(shared, spec)
                             for spec in tasks[first:first + wave]]
                    dask_compute(*graph, callbacks=callbacks,  # type: ignore[no-untyped-call]
                                 **kwargs)
            except BaseException:
                STOP.set()  # tasks in this process stop after their current frame
                raise
    finally:
        STOP.clear()


@contextlib.contextmanager
def open_local_scheduler(compute: ComputeSettings, *, name: str) -> Iterator[dict[str, Any]]:
    """Keyword arguments of ``dask.compute`` for a local ``[compute] scheduler``.

    "threads" and "processes" run in a pool of ``compute.workers`` (spawned processes, so
    numba and FFT thread pools are never forked) that is shut down on exit, in-flight work
    awaited; "synchronous" runs in the calling thread.

    Raises
    ------
    ConfigError
        For a scheduler that is not a local one.
    """
    pool: Executor | None = None
    if compute.scheduler == "threads":
        pool = ThreadPoolExecutor(compute.workers, thread_name_prefix=name)
    elif compute.scheduler == "processes":
        pool = ProcessPoolExecutor(compute.workers,
                                   mp_context=multiprocessing.get_context("spawn"))
    elif compute.scheduler != "synchronous":
        raise ConfigError(f"unknown local scheduler {compute.scheduler!r}")
    kwargs: dict[str, Any] = {"scheduler": compute.scheduler}
    if pool is not None:
        kwargs.update(pool=pool, num_workers=compute.workers)
    if compute.scheduler == "processes":
        # dask's process scheduler hands up to 6 ready tasks to one worker in one batch
        # (config "chunksize"): a wave of 4 tasks then ran on one process, one after the
        # other, while the other sat idle (the run took 1.8x its per-worker solve time).
        kwargs["chunksize"] = 1
    try:
        yield kwargs
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)


# ---------------------------------------------------------------------------- distributed
@dataclass(frozen=True)
class LostWorker:
    """A dask worker that left the cluster without being retired (killed, crashed, cut off).

    Attributes
    ----------
    address : str
        Its address (``tcp://host:port``); a nanny restarts a worker on a new one.
    host : str or None
        Its host.
    pid : int or None
        Its process id.
    lost_epoch_s : float
        When the scheduler removed it (seconds since the epoch, the scheduler's clock).
    """

    address: str
    host: str | None
    pid: int | None
    lost_epoch_s: float

    def record(self) -> dict[str, Any]:
        """The JSON form kept in the run record (``lost`` in ISO 8601 local time)."""
        return {"address": self.address, "host": self.host, "pid": self.pid,
                "lost": time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(self.lost_epoch_s)),
                "lost_epoch_s": self.lost_epoch_s}


def no_workers_timeout_s() -> float:
    """Seconds a distributed run waits with no worker left after losing some (see
    :data:`NO_WORKERS_TIMEOUT`; dask config key ``volrecon.no-workers-timeout``)."""
    return dask_config_seconds("volrecon.no-workers-timeout", NO_WORKERS_TIMEOUT)


class _WorkerWatch:
    """Looks at the scheduler's workers between results and notices the ones lost.

    A worker that vanished from the scheduler is lost unless the scheduler's own event for
    its removal says it was expected (retired by an adaptive cluster, closed on purpose).
    """

    def __init__(self, client: Any, *, timeout_s: float) -> None:
        self.client = client
        self.timeout_s = timeout_s
        self.known = self._workers({})
        self.lost: list[LostWorker] = []
        self.empty_since: float | None = None
        self.next_look = time.monotonic() + WORKER_POLL_S

    def _workers(self, known: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
        """The scheduler's workers by address, each with its ``host`` and ``pid`` (None if
        unknown); pids of workers already `known` are kept."""
        workers = self.client.scheduler_info(n_workers=-1)["workers"]
        current = {address: {"host": info.get("host"),
                             "pid": known.get(address, {}).get("pid")}
                   for address, info in workers.items()}
        new = [address for address in current if address not in known]
        if new:  # one round trip per change of the worker set, not per look
            pids = self.client.run(os.getpid, workers=new, on_error="ignore")
            for address, pid in pids.items():
                if address in current and isinstance(pid, int):
                    current[address]["pid"] = pid
        return current

    def look(self, *, now: bool = False) -> list[LostWorker]:
        """Workers lost since the last look (at most one look per WORKER_POLL_S, unless
        `now`)."""
        moment = time.monotonic()
        if moment < self.next_look and not now:
            return []
        self.next_look = moment + WORKER_POLL_S
        current = self._workers(self.known)
        lost = []
        for address, info in self.known.items():
            if address in current:
                continue
            removed_s, expected = self._removal(address)
            if not expected:
                pid = info.get("pid")
                lost.append(LostWorker(address=address, host=info.get("host"),
                                       pid=int(pid) if pid is not None else None,
                                       lost_epoch_s=removed_s))
        lost.sort(key=lambda worker: worker.lost_epoch_s)
        self.known = current
        if current:
            self.empty_since = None
        elif self.empty_since is None:
            self.empty_since = moment
        self.lost.extend(lost)
        return lost

    def _removal(self, address: str) -> tuple[float, bool]:
        """When the scheduler removed `address` and whether it expected to (its event log)."""
        for stamp, message in reversed(self.client.get_events(address)):
            if isinstance(message, dict) and message.get("action") == "remove-worker":
                return float(stamp), bool(message.get("expected", False))
        return time.time(), False

    def all_gone(self) -> bool:
        """True once workers were lost and none has been there for `timeout_s` seconds."""
        return (bool(self.lost) and self.empty_since is not None
                and time.monotonic() - self.empty_since >= self.timeout_s)


def _execute_distributed(tasks: Sequence[TaskSpec], context: TaskContext,
                         compute: ComputeSettings, on_result: Callable[[FrameRecords], None],
                         on_lost_worker: Callable[[LostWorker], None] | None,
                         client: Any) -> None:
    from distributed import KilledWorker

    timeout_s = no_workers_timeout_s()
    with contextlib.ExitStack() as stack:
        if client is None:
            client = stack.enter_context(open_client(compute))
        watch = _WorkerWatch(client, timeout_s=timeout_s)
        shared = client.scatter(context, broadcast=True, hash=False)
        window = max(2, WINDOW_TASKS_PER_THREAD * sum(client.nthreads().values()))
        run_id = uuid.uuid4().hex[:8]
        pending: collections.deque[TaskSpec] = collections.deque(tasks)
        in_flight: dict[Any, TaskSpec] = {}
        attempts = itertools.count()

        def fill() -> None:
            nonlocal shared
            if not pending or len(in_flight) >= window:
                return
            if shared.status != "finished":
                # The scattered context went with the last worker that held it: scatter it
                # again once a worker is there.
                if not watch.known:
                    return
                try:
                    shared = client.scatter(context, broadcast=True, hash=False,
                                            timeout=SCATTER_TIMEOUT_S)
                except TimeoutError:  # the workers seen at the last look are gone too
                    return
            while pending and len(in_flight) < window:
                spec = pending.popleft()
                # A fresh key per attempt: a resubmitted task never meets its cancelled self.
                future = client.submit(run_task, shared, spec, pure=False,
                                       key=f"volrecon-task-{run_id}-{spec.index}-"
                                           f"{next(attempts)}")
                in_flight[future] = spec

        try:
            fill()
            while in_flight or pending:
                done = _wait_some(list(in_flight))
                _report_lost(watch.look(), on_lost_worker)
                if watch.all_gone():
                    raise WorkersLostError(_all_lost_message(watch))
                for future in done:
                    spec = in_flight.pop(future)
                    failure = future.exception() if future.status == "error" else None
                    if isinstance(failure, KilledWorker):
                        raise WorkersLostError(_killed_task_message(spec, failure)) from failure
                    try:
                        records = future.result()
                    except CancelledError:
                        # Lost with a worker (its result, or the scattered context it
                        # needed): run it again; it rewrites its frames whole.
                        pending.appendleft(spec)
                        continue
                    future.release()
                    on_result(records)
                fill()
            # A worker lost in the last moments is recorded too.
            _report_lost(watch.look(now=True), on_lost_worker)
        except BaseException:
            if in_flight:
                client.cancel(list(in_flight))
            raise


def _wait_some(futures: list[Any]) -> set[Any]:
    """Futures of `futures` that ended (finished, erred or cancelled) within WORKER_POLL_S."""
    from distributed import wait

    if not futures:
        time.sleep(WORKER_POLL_S)
        return set()
    try:
        return set(wait(futures, timeout=WORKER_POLL_S,  # type: ignore[no-untyped-call]
                        return_when="FIRST_COMPLETED").done)
    except TimeoutError:
        return set()
    except CancelledError:  # lost with the scattered context; `wait` raises for those
        return {future for future in futures if future.status == "cancelled"}


def _report_lost(lost: list[LostWorker],
                 on_lost_worker: Callable[[LostWorker], None] | None) -> None:
    for worker in lost:
        logger.warning("dask worker %s (pid %s) lost; its tasks run again elsewhere",
                       worker.address, worker.pid)
        if on_lost_worker is not None:
            on_lost_worker(worker)


def _all_lost_message(watch: _WorkerWatch) -> str:
    n = len(watch.lost)
    return (f"all dask workers were lost ({n} lost in this run, the last "
            f"{watch.lost[-1].address}) and none came back within "
            f"{watch.timeout_s:g} s; frames already done are kept: start workers (or check the "
            "cluster), then run the same command again to continue")


def _killed_task_message(spec: TaskSpec, killed: Any) -> str:
    allowed = int(killed.allowed_failures)  # the scheduler's setting
    return (f"frames {spec.start}:{spec.stop}: dask workers died {allowed + 1} "
            f"time{'s' if allowed else ''} while running their task (out of memory? "
            f"distributed.scheduler.allowed-failures is {allowed}); frames already done are "
            "kept: give the workers more memory or use a smaller [compute] frames_per_task, "
            "then run the same command again to continue")


@contextlib.contextmanager
def open_client(compute: ComputeSettings) -> Iterator[Any]:
    """A dask.distributed client for ``[compute] scheduler`` (a LocalCluster or an address)."""
    from distributed import Client, LocalCluster

    if compute.scheduler == "local-cluster":
        # Loopback only and no dashboard; the scheduler's small HTTP server (health, metrics)
        # takes a free port instead of 8787, which may be taken (it would warn).
        with LocalCluster(n_workers=compute.workers, threads_per_worker=1, processes=True,
                          host="127.0.0.1", dashboard_address=None,
                          scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}
                          ) as cluster, Client(cluster) as client:  # type: ignore[no-untyped-call]
            yield client
        return
    try:
        client = Client(compute.scheduler, timeout="30s")  # type: ignore[no-untyped-call]
    except OSError as exc:
        raise ConfigError(
            f"compute.scheduler: cannot reach the dask scheduler at {compute.scheduler} "
            f"({exc}); start it (dask scheduler) or fix the address"
        ) from exc
    with client:
        yield client
