"""Check that every finished frame of a job's store reads back, and send damaged ones back.

:func:`verify_store` reads, in a thread pool, every chunk of every finished frame: the volume
(``"0"``), the projections and the diagnostics chunks holding it. zarr checks each chunk's
CRC32C checksum (store format 2) while decoding it, so a flipped bit raises instead of
returning wrong numbers; a finished frame whose chunk file is gone is damaged too (only a
failed frame, all NaN, has no chunks). Damaged frames are marked pending and their damaged
chunk files deleted (:meth:`JobStore.mark_pending`): the next ``volrecon run`` of the job
recomputes their warm-start chains, bit-identical to an undamaged run. What the check found
is kept in the store's ``volrecon`` attribute under ``last_verify``.
"""

from __future__ import annotations

import contextlib
import os
import sys
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from volrecon.pipeline.export import parse_frame_range
from volrecon.pipeline.lock import StoreLock
from volrecon.pipeline.shards import is_sharded, shard_file
from volrecon.pipeline.store import DAMAGE_ERRORS, STATUS_FAILED, STATUS_PENDING, JobStore

__all__ = ["VerifyProgress", "VerifyReport", "verify_progress_bar", "verify_store"]

#: Damaged frames listed in the store's ``last_verify`` record (the count is always kept).
RECORDED_FRAMES = 1000


@dataclass(frozen=True)
class VerifyProgress:
    """Where a check stands: frames read of the frames to read, damaged so far."""

    checked: int
    total: int
    damaged: int


@dataclass(frozen=True)
class VerifyReport:
    """What :func:`verify_store` found.

    Attributes
    ----------
    path : Path
        The store.
    frames : tuple of 2 ints
        The store frames ``start:stop`` checked.
    checked : int
        Finished frames read (done or failed; pending frames hold nothing to check).
    damaged : dict of int to tuple of str
        For each damaged frame, what is damaged (``"volume"``, ``"projection max_z"``,
        ``"diagnostics residual"``) and how (``"chunk damaged"``, ``"chunk missing"``).
    checksums : bool
        The store's chunks carry checksums (format 2); without them only chunks that do not
        decode are found.
    """

    path: Path
    frames: tuple[int, int]
    checked: int
    damaged: dict[int, tuple[str, ...]] = field(default_factory=dict)
    checksums: bool = True

    @property
    def intact(self) -> bool:
        """True when no frame is damaged."""
        return not self.damaged

    def lines(self) -> list[str]:
        """One line per damaged frame: ``frame 3: volume chunk damaged``."""
        return [f"frame {t}: {', '.join(parts)}" for t, parts in sorted(self.damaged.items())]


def verify_store(path: str | os.PathLike[str], *, frames: str | None = None,
                 workers: int | None = None,
                 progress: Callable[[VerifyProgress], None] | None = None) -> VerifyReport:
    """Read every finished frame of a job's store; mark damaged frames pending.

    Parameters
    ----------
    path : str or path
        A job's output store.
    frames : str, optional
        ``"a:b"``: check store frames a to b-1 only (as ``volrecon export --frames``). A
        damaged diagnostics chunk holds 4096 frames; all of its finished frames are marked
        pending, also those outside the range.
    workers : int, optional
        Reading threads; default the number of cores, at most 8.
    progress : callable, optional
        Called with a :class:`VerifyProgress` after each frame, in this thread.

    Returns
    -------
    VerifyReport

    Raises
    ------
    InputFileError
        If `path` is not a volrecon output store (another format, a PSF model store, a
        damaged ``zarr.json``); nothing is written then.
    StoreLockedError
        If a run is writing the store.
    ConfigError
        If `frames` is malformed or selects no frame.
    """
    path = Path(path)
    store = JobStore.open(path)  # refuses anything that is not an output store: no write yet
    selected = parse_frame_range(frames, store.n_frames)
    with StoreLock(path):
        started = time.time()
        # Frames a killed run committed are recorded first, so they are checked too, and a
        # frame sent back to pending here is never marked done again by its old journal.
        store.absorb_journals()
        report, damaged_chunks = _check(store, selected, workers=workers, progress=progress)
        if report.damaged:
            store.mark_pending(report.damaged, damaged_chunks=damaged_chunks)
        damaged = sorted(report.damaged)
        store.update_attributes(last_verify={
            "started": _timestamp(started), "started_epoch_s": started,
            "ended": _timestamp(time.time()), "frames": [selected.start, selected.stop],
            "checked": report.checked, "damaged": len(damaged),
            "damaged_frames": damaged[:RECORDED_FRAMES], "marked_pending": bool(damaged),
            "checksums": report.checksums})
    return report


def _check(store: JobStore, selected: slice, *, workers: int | None,
           progress: Callable[[VerifyProgress], None] | None
           ) -> tuple[VerifyReport, list[Path]]:
    damaged: dict[int, list[str]] = {}
    damaged_chunks: list[Path] = []

    def note(t: int, what: str) -> None:
        if what not in damaged.setdefault(t, []):
            damaged[t].append(what)

    # Diagnostics first: a chunk holds many frames, and an unreadable status chunk leaves
    # its frames' state unknown (they are all checked, and all sent back).
    status = np.full(store.n_frames, STATUS_PENDING, np.uint8)
    unknown: set[int] = set()
    for name, array in store.diagnostics_arrays().items():
        step = int(array.chunks[0])
        for c in range(selected.start // step, (selected.stop - 1) // step + 1):
            region = slice(c * step, min((c + 1) * step, store.n_frames))
            try:
                values = np.asarray(array[region])
            except DAMAGE_ERRORS:
                damaged_chunks.append(store.chunk_path(array, (c,)))
                if name == "status":
                    unknown.update(range(region.start, region.stop))
                continue
            if name == "status":
                status[region] = values
    finished = {t for t in range(store.n_frames) if status[t] != STATUS_PENDING} | unknown
    for chunk in damaged_chunks:
        name = chunk.relative_to(store.path).parts[1]
        step = int(store.diagnostics_arrays()[name].chunks[0])
        c = int(chunk.name)
        for t in range(c * step, min((c + 1) * step, store.n_frames)):
            if t in finished:
                note(t, f"diagnostics {name} chunk damaged")
    to_read = [t for t in range(selected.start, selected.stop) if t in finished]
    arrays = store.frame_arrays()
    n_workers = workers if workers is not None else min(8, os.cpu_count() or 1)
    with ThreadPoolExecutor(max(1, n_workers), thread_name_prefix="volrecon-verify") as pool:
        futures = [pool.submit(_check_frame, store, arrays, t, expect_chunks=t not in unknown
                               and status[t] != STATUS_FAILED) for t in to_read]
        for checked, future in enumerate(as_completed(futures), start=1):
            t, problems = future.result()
            for what, bad_chunk in problems:
                note(t, what)
                if bad_chunk is not None:
                    damaged_chunks.append(bad_chunk)
            if progress is not None:
                progress(VerifyProgress(checked=checked, total=len(to_read),
                                        damaged=len(damaged)))
    checksums = store.attributes.get("format_version") != 1
    return (VerifyReport(path=store.path, frames=(selected.start, selected.stop),
                         checked=len(to_read),
                         damaged={t: tuple(parts) for t, parts in damaged.items()},
                         checksums=checksums),
            damaged_chunks)


def _check_frame(store: JobStore, arrays: dict[str, Any], t: int, *, expect_chunks: bool
                 ) -> tuple[int, list[tuple[str, Path | None]]]:
    """Read every chunk of frame `t`; what is damaged, and the file to delete (if any).

    A shard file holds other frames too: it is never deleted; the frame is marked pending and
    the next run rewrites the whole shard (:func:`volrecon.pipeline.plan.plan_tasks`)."""
    problems: list[tuple[str, Path | None]] = []
    for key, array in arrays.items():
        what = "volume" if key == "0" else f"projection {key.rsplit('/', 1)[-1]}"
        chunk_shape = array.chunks[1:]
        for rest in np.ndindex(*array.cdata_shape[1:]):
            sharded = is_sharded(array)
            chunk = (shard_file(store.path, array, t) if sharded
                     else store.chunk_path(array, (t, *rest)))
            region = (t, *(slice(c * n, (c + 1) * n)
                             for c, n in zip(rest, chunk_shape, strict=True)))
            try:
                values = array[region]
            except DAMAGE_ERRORS:
                problems.append((f"{what} chunk damaged", None if sharded else chunk))
                continue
            if expect_chunks and (not chunk.is_file()
                                  or (sharded and np.isnan(values).all())):
                problems.append((f"{what} chunk missing", None))
    return t, problems


def _timestamp(epoch_s: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(epoch_s))


@contextlib.contextmanager
def verify_progress_bar(*, file: TextIO | None = None, disable: bool | None = None
                        ) -> Iterator[Callable[[VerifyProgress], None]]:
    """A progress callback for :func:`verify_store` that draws a tqdm bar of frames read.

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

    def update(event: VerifyProgress) -> None:
        bar = state["bar"]
        if bar is None:
            bar = state["bar"] = tqdm(total=event.total, unit="frame", file=stream,
                                      disable=disable, dynamic_ncols=True, smoothing=0.1)
        bar.update(event.checked - bar.n)
        bar.set_postfix(damaged=event.damaged, refresh=False)

    try:
        yield update
    finally:
        if state["bar"] is not None:
            state["bar"].close()
