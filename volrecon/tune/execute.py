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
from collections.abc import Callable, Iterator, Sequence
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
    with _scheduler(compute, client) as kwargs:
        shared = delayed(model, pure=False)
        graph = [delayed(function, pure=False)(shared, *call) for call in calls]
        return list(dask_compute(*graph, **kwargs))  # type: ignore[no-untyped-call]


@contextlib.contextmanager
def _scheduler(compute: ComputeSettings, client: Any) -> Iterator[dict[str, Any]]:
    """``dask.compute`` keywords: the job's own executors (:mod:`volrecon.pipeline.execute`)."""
    from volrecon.pipeline.execute import open_client, open_local_scheduler

    if client is not None:
        yield {"scheduler": client}
    elif compute.is_distributed:
        with open_client(compute) as own:
            yield {"scheduler": own}
    else:
        with open_local_scheduler(compute, name="volrecon-tune") as kwargs:
            yield kwargs
