"""A terminal progress bar for a run: frames done of total, throughput and time left."""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Callable, Iterator
from typing import Any, TextIO

from volrecon.pipeline.job import JobProgress

__all__ = ["progress_bar"]


@contextlib.contextmanager
def progress_bar(*, file: TextIO | None = None, disable: bool | None = None
                 ) -> Iterator[Callable[[JobProgress], None]]:
    """A progress callback for :func:`volrecon.pipeline.run_job` that draws a tqdm bar.

    The bar counts frames (done or failed) of the whole job, shows this run's throughput in
    frames per second, the estimated time left, and the number of failed frames.

    Parameters
    ----------
    file : text stream, optional
        Where to draw; default ``sys.stderr``.
    disable : bool, optional
        True: draw nothing; None (default): draw only on a terminal.
    """
    from tqdm import tqdm

    stream = sys.stderr if file is None else file
    state: dict[str, Any] = {"bar": None}

    def update(event: JobProgress) -> None:
        bar = state["bar"]
        if bar is None:
            bar = state["bar"] = tqdm(total=event.total, initial=event.done_at_start,
                                      unit="frame", file=stream, disable=disable,
                                      dynamic_ncols=True, smoothing=0.1)
        bar.update(event.done - bar.n)
        bar.set_postfix(failed=event.failed, refresh=False)

    try:
        yield update
    finally:
        if state["bar"] is not None:
            state["bar"].close()
