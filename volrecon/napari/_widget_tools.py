"""Small helpers shared by the dock widgets: chosen paths and one background job at a time."""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

__all__ = ["BackgroundJob", "chosen_path"]


def chosen_path(widget: Any) -> Path | None:
    """The path in a magicgui ``FileEdit``, or None when nothing is chosen."""
    value = widget.value
    if not isinstance(value, str | os.PathLike):
        return None
    text = os.fspath(value).strip()
    return None if text in ("", ".") else Path(text)


class BackgroundJob:
    """Runs a widget's work in a napari ``thread_worker``, one job at a time.

    :attr:`busy` is True from :meth:`start` until the worker has finished (also while it is
    still queued). Results arriving after the widget was closed are dropped, so a slow read
    never touches deleted Qt objects.

    Parameters
    ----------
    native : QWidget
        The widget's Qt widget; its ``destroyed`` signal marks the widget gone.
    """

    def __init__(self, native: Any) -> None:
        self.busy = False
        self.worker: Any = None
        self._alive = True
        native.destroyed.connect(self._gone)

    def _gone(self, *_: Any) -> None:
        self._alive = False

    def start(self, function: Callable[..., Any], *args: Any,
              on_result: Callable[[Any], None],
              on_finished: Callable[[], None] | None = None) -> Any:
        """Run ``function(*args)`` off the GUI thread; returns the worker."""
        from napari.qt.threading import thread_worker

        def returned(result: Any) -> None:
            if self._alive:
                on_result(result)

        def finished() -> None:
            self.busy = False
            if self._alive and on_finished is not None:
                on_finished()

        worker = thread_worker(function, start_thread=False)(*args)
        worker.returned.connect(returned)
        worker.finished.connect(finished)
        self.busy = True
        self.worker = worker
        worker.start()
        return worker
