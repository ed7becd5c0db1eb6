"""Progress of a run: a terminal bar, or plain lines in a log (frames, throughput, time left)."""

from __future__ import annotations

import contextlib
import math
import sys
import time
from collections.abc import Callable, Iterator
from typing import Any, TextIO

from volrecon.pipeline.job import JobProgress
from volrecon.pipeline.status import format_duration

__all__ = ["LOG_INTERVAL_S", "progress_bar", "progress_line"]

#: Seconds between progress lines when stderr is not a terminal (a batch system's log).
LOG_INTERVAL_S = 60.0


def progress_line(event: JobProgress) -> str:
    """One plain line: frames finished of total, failures, this run's frames/s, time left.

    Examples
    --------
    >>> from volrecon.pipeline.job import JobProgress
    >>> progress_line(JobProgress(done=120, done_at_start=0, total=240, failed=2,
    ...                           computed=120, elapsed_s=300.0, frames_per_second=0.4,
    ...                           seconds_left=300.0))
    'progress: 120/240 frames (2 failed), 0.4 frames/s, time left 5 min 00 s'
    """
    rate = f"{event.frames_per_second:.3g} frames/s" if event.computed else "starting"
    left = (f", time left {format_duration(event.seconds_left)}"
            if math.isfinite(event.seconds_left) else "")
    return f"progress: {event.done}/{event.total} frames ({event.failed} failed), {rate}{left}"


@contextlib.contextmanager
def progress_bar(*, file: TextIO | None = None, disable: bool | None = None,
                 interval_s: float = LOG_INTERVAL_S,
                 ) -> Iterator[Callable[[JobProgress], None]]:
    """A progress callback for :func:`volrecon.pipeline.run_job`.

    On a terminal: a tqdm bar of frames (done or failed) of the whole job, from the run's
    start, with this run's throughput and time left computed from wall time since the start
    (as the run's summary computes them). Elsewhere (a cluster log): one
    :func:`progress_line` at the start, at most every `interval_s` seconds, and at the end.

    Parameters
    ----------
    file : text stream, optional
        Where to write; default ``sys.stderr``.
    disable : bool, optional
        True: nothing; False: always the bar; None (default): the bar on a terminal, plain
        lines otherwise.
    interval_s : float
        Seconds between plain lines.
    """
    stream = sys.stderr if file is None else file
    terminal = bool(getattr(stream, "isatty", lambda: False)())
    state: dict[str, Any] = {"bar": None, "last": None, "written": -math.inf, "shown": None}
    plain = disable is None and not terminal

    def update(event: JobProgress) -> None:
        state["last"] = event
        if disable:
            return
        if plain:
            now = time.monotonic()
            if now - state["written"] >= interval_s:
                state["written"], state["shown"] = now, event
                print(progress_line(event), file=stream, flush=True)
            return
        from tqdm import tqdm

        bar = state["bar"]
        if bar is None:
            bar = state["bar"] = tqdm(total=event.total, initial=event.done_at_start,
                                      unit="frame", file=stream, dynamic_ncols=True,
                                      bar_format="{l_bar}{bar}| {n_fmt}/{total_fmt} {postfix}")
        bar.update(event.done - bar.n)
        left = format_duration(event.seconds_left) if math.isfinite(event.seconds_left) \
            else "?"
        bar.set_postfix_str(f"{event.frames_per_second:.3g} frames/s, {left} left, "
                            f"{event.failed} failed", refresh=True)

    try:
        yield update
    finally:
        if state["bar"] is not None:
            state["bar"].close()
        elif plain and state["last"] is not None and state["last"] is not state["shown"]:
            print(progress_line(state["last"]), file=stream, flush=True)
