"""Run the tuning reconstructions through dask, on the scheduler of the job's ``[compute]``.

Every reconstruction of a sweep (one setting on one frame, or one warm-start chain) is an
independent ``dask.delayed`` call of a module-level function, so the same code runs on the
threaded, process and synchronous schedulers and on dask.distributed (a ``LocalCluster`` or
a ``tcp://`` scheduler), with ``workers`` tasks at once and the FFT threads per task that
:func:`volrecon.pipeline.fft_threads_per_task` decides for the job itself. The PSF model
enters the graph once.
"""

from __future__ import annotations

import contextlib
import multiprocessing
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Executor, ProcessPoolExecutor, ThreadPoolExecutor
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from volrecon.models.base import PSFModel
    from volrecon.pipeline.config import ComputeSettings

__all__ = ["run_calls"]


def run_calls(function: Callable[..., Any], model: PSFModel, calls: Sequence[tuple[Any, ...]],
              compute: ComputeSettings, *, client: Any = None) -> list[Any]:
    """Evaluate ``function(model, *call)`` for every call, in parallel; results in order.

    Parameters
    ----------
    function : callable
        A module-level (picklable) function taking the model first.
    model : PSFModel
        Shared by all calls; enters the graph once.
    calls : sequence of tuple
        Remaining positional arguments of each call.
    compute : ComputeSettings
        ``scheduler`` and ``workers`` of the job.
    client : distributed.Client, optional
        Use this client instead of ``compute.scheduler``.

    Raises
    ------
    ConfigError
        If the scheduler cannot be reached.
    """
    from dask.base import compute as dask_compute
    from dask.delayed import delayed

    if not calls:
        return []
    with _scheduler(compute, client) as (scheduler, pool):
        shared = delayed(model, pure=False)
        graph = [delayed(function, pure=False)(shared, *call) for call in calls]
        kwargs: dict[str, Any] = {"scheduler": scheduler}
        if pool is not None:
            kwargs.update(pool=pool, num_workers=compute.workers)
        return list(dask_compute(*graph, **kwargs))  # type: ignore[no-untyped-call]


@contextlib.contextmanager
def _scheduler(compute: ComputeSettings, client: Any) -> Iterator[tuple[Any, Executor | None]]:
    if client is not None:
        yield client, None
        return
    if compute.scheduler == "synchronous":
        yield "synchronous", None
        return
    if compute.scheduler in ("threads", "processes"):
        pool: Executor = (ThreadPoolExecutor(compute.workers, thread_name_prefix="volrecon-tune")
                          if compute.scheduler == "threads" else
                          ProcessPoolExecutor(compute.workers,
                                              mp_context=multiprocessing.get_context("spawn")))
        try:
            yield compute.scheduler, pool
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
        return
    from volrecon.pipeline.execute import open_client

    with open_client(compute) as own:
        yield own, None
