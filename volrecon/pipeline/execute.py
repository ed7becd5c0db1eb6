"""Run a job's tasks on a dask scheduler and hand each finished task's records to the driver.

Local schedulers (``threads``, ``processes``, ``synchronous``) get the tasks in waves, each a
small dask graph, so a million-frame job never builds a million-task graph; a dask callback
reports every finished task in the driver's thread. dask.distributed (a ``LocalCluster`` or a
``tcp://`` scheduler) gets a sliding window of futures. In both cases at most a few tasks per
worker are in flight, so memory does not grow with the length of the video.
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Executor, ProcessPoolExecutor, ThreadPoolExecutor
from typing import TYPE_CHECKING, Any

from volrecon.backend import split_threads
from volrecon.errors import ConfigError
from volrecon.pipeline.store import FrameRecords
from volrecon.pipeline.task import run_task

if TYPE_CHECKING:
    from volrecon.pipeline.config import ComputeSettings
    from volrecon.pipeline.task import TaskContext, TaskSpec

__all__ = ["execute_tasks", "fft_threads_per_task", "open_client", "open_local_scheduler"]

logger = logging.getLogger(__name__)

#: Tasks per wave on the local schedulers, per worker: graphs stay small, and the idle tail
#: at the end of a wave (at most one task per worker) stays a small fraction of it.
WAVE_TASKS_PER_WORKER = 64
#: Futures in flight on dask.distributed, per worker thread.
WINDOW_TASKS_PER_THREAD = 2


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
                  on_result: Callable[[FrameRecords], None], *, client: Any = None) -> None:
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

    Raises
    ------
    Exception
        The first error a task raises (input file unreadable, store not writable …); tasks
        still running are cancelled or awaited, never recorded.
    KeyboardInterrupt
        On Ctrl-C, after in-flight local tasks have stopped.
    """
    if not tasks:
        return
    if client is not None or compute.is_distributed:
        _execute_distributed(tasks, context, compute, on_result, client)
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
    with open_local_scheduler(compute, name="volrecon-task") as kwargs:
        for first in range(0, len(tasks), wave):
            graph = [delayed(run_task, pure=False)(shared, spec)
                     for spec in tasks[first:first + wave]]
            dask_compute(*graph, callbacks=callbacks, **kwargs)  # type: ignore[no-untyped-call]


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
    try:
        yield kwargs
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)


# ---------------------------------------------------------------------------- distributed
def _execute_distributed(tasks: Sequence[TaskSpec], context: TaskContext,
                         compute: ComputeSettings, on_result: Callable[[FrameRecords], None],
                         client: Any) -> None:
    from distributed import as_completed

    with contextlib.ExitStack() as stack:
        if client is None:
            client = stack.enter_context(open_client(compute))
        shared = client.scatter(context, broadcast=True, hash=False)
        window = max(2, WINDOW_TASKS_PER_THREAD * sum(client.nthreads().values()))
        run_id = uuid.uuid4().hex[:8]
        remaining: Iterator[TaskSpec] = iter(tasks)

        def submit(spec: TaskSpec) -> Any:
            return client.submit(run_task, shared, spec, pure=False,
                                 key=f"volrecon-task-{run_id}-{spec.index}")

        first = [submit(spec) for _, spec in zip(range(window), remaining, strict=False)]
        futures = as_completed(first)  # type: ignore[no-untyped-call]
        try:
            for future in futures:
                records = future.result()
                future.release()
                on_result(records)
                spec = next(remaining, None)
                if spec is not None:
                    futures.add(submit(spec))  # type: ignore[no-untyped-call]
        except BaseException:
            outstanding = list(futures.futures)
            if outstanding:
                client.cancel(outstanding)
            raise


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
