"""Per-frame commits of a running task: the record a kill or Ctrl-C cannot take back.

The diagnostics arrays are shared by thousands of frames, so only the driver writes them, once
a task has ended (:meth:`volrecon.pipeline.store.JobStore.record`). Inside a task, each frame
is committed on its own as soon as its data is on disk: the task fsyncs the frame's files
(and their folders), then appends one JSON line with the frame's diagnostics to its journal,
``<store>/diagnostics/status/commits/<start>-<stop>.jsonl``, and fsyncs that. The driver folds
journals into the diagnostics (:func:`read_journal`, then ``record``) when a task ends, when a
run stops for any reason and when the next run starts, and deletes them. A journal lives
inside the ``status`` array's folder, where zarr never looks for nodes, so readers of the store
see nothing of it.

A line cut short by a kill is ignored: its frame simply stays pending. In a sharded store a
frame's data is on disk when its shard file is written, so a journal commits a shard's frames
together, after the shard.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["JOURNAL_FOLDER", "FrameJournal", "journal_path", "journal_paths", "read_journal"]

#: Where journals live inside a store (a folder of the status array, invisible to zarr).
JOURNAL_FOLDER = ("diagnostics", "status", "commits")

#: The fields of one committed frame, as written in a journal line.
_FIELDS = ("t", "status", "iterations", "objective", "residual", "converged", "seconds")


def journal_path(store_path: str | os.PathLike[str], start: int, stop: int) -> Path:
    """The journal of the task writing frames ``start:stop``."""
    return Path(store_path).joinpath(*JOURNAL_FOLDER, f"{start}-{stop}.jsonl")


def journal_paths(store_path: str | os.PathLike[str]) -> list[Path]:
    """Every journal present in the store, in frame order."""
    folder = Path(store_path).joinpath(*JOURNAL_FOLDER)
    try:
        found = [p for p in folder.iterdir() if p.suffix == ".jsonl"]
    except (FileNotFoundError, NotADirectoryError):
        return []
    return sorted(found, key=lambda p: [int(n) for n in p.stem.split("-") if n.isdigit()])


class FrameJournal:
    """The journal a task appends its committed frames to (one line each, fsynced).

    Parameters
    ----------
    store_path : str or path
        The job's store.
    start, stop : int
        The task's frames; the journal starts empty (a rerun of the task starts over).
    """

    def __init__(self, store_path: str | os.PathLike[str], start: int, stop: int) -> None:
        self.path = journal_path(store_path, start, stop)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._file = open(self.path, "w", encoding="utf-8")  # closed in close()

    def commit(self, frames: list[dict[str, Any]]) -> None:
        """Append `frames` (dicts with :data:`_FIELDS` and ``failure``) and fsync."""
        if not frames:
            return
        self._file.write("".join(json.dumps(_plain(f)) + "\n" for f in frames))
        self._file.flush()
        os.fsync(self._file.fileno())

    def close(self) -> None:
        """Close the file (the journal stays until the driver folds it in)."""
        self._file.close()


def read_journal(path: str | os.PathLike[str]) -> list[dict[str, Any]]:
    """The frames committed in journal `path`, in order; a torn or damaged line and
    everything after it is dropped (those frames stay pending)."""
    frames: list[dict[str, Any]] = []
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (FileNotFoundError, UnicodeDecodeError):
        return frames
    for line in text.split("\n"):
        try:
            entry = json.loads(line)
            if not isinstance(entry, dict) or not all(k in entry for k in _FIELDS):
                break
            frames.append(entry)
        except ValueError:
            break
    return frames


def _plain(frame: dict[str, Any]) -> dict[str, Any]:
    """JSON-safe values: numpy scalars become plain numbers (NaN is written as NaN, which
    Python's json reads back)."""
    return {key: value.item() if isinstance(value, np.generic) else value
            for key, value in frame.items()}
