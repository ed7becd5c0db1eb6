"""The output store of a job: OME-Zarr image, per-frame diagnostics, settings and provenance.

Layout (zarr v3; attributes in ``schemas/output-store.schema.json``; for users in
``workflows/README.md``)::

    volumes.zarr/                      group; attributes "ome" (OME-NGFF 0.5) and "volrecon"
      0                                (T, Z, Y, X) float32, one frame per chunk, NaN = not done;
                                       format 3: shards of shard_frames frames (one file each)
      diagnostics/                     group; attribute "failures" {frame: reason}
        status      (T,) uint8         0 pending, 1 done, 2 failed — written last, by the driver
          commits/<start>-<stop>.jsonl   a running task's per-frame commits (pipeline/journal.py)
        iterations  (T,) int32
        objective   (T,) float64
        residual    (T,) float64       |Av - b| / |b|
        converged   (T,) bool
        seconds     (T,) float32
      projections/                     only with [output] max_projections = true
        max_z (T, Y, X), max_y (T, Z, X), max_x (T, Z, Y)   float32
    volumes.zarr.lock                  beside the store while a run writes it

Volume chunks are written by the tasks, one frame per chunk, so no two tasks share a chunk.
In a format 3 store the volume and the projections are zarr v3 sharded arrays: each file holds
``shard_frames`` frames (``volumes.zarr/0/c/<shard>/0/0/0``), one inner chunk per frame, so a
reader still reads one frame's bytes (through the shard's index); the task owning a shard's
frames writes the file whole, once (:mod:`volrecon.pipeline.shards`). ``shard_frames = 1`` (and
every format 1 and 2 store) keeps one file per chunk.
The diagnostics arrays are written only by the driver, after a task's volumes are on disk:
a frame's ``status`` turns non-zero only when its data is complete. Inside a task each frame
is committed on its own once its files are fsynced, as a line of the task's journal, which the
driver folds into the diagnostics (:mod:`volrecon.pipeline.journal`), so a kill loses only the
frames in flight.

Every chunk carries a CRC32C checksum after its zstd bytes (store format 2;
:func:`volrecon.io.ome_zarr.chunk_codecs`), so reading a damaged chunk raises instead of
returning wrong numbers; ``volrecon verify`` reads them all. Durability: before a task's
frames are recorded, the driver fsyncs their chunk files (volume, projections) and every
folder from theirs up to the store's, then the diagnostics chunks it wrote, and only then
writes and fsyncs the ``status`` chunk (:meth:`JobStore.record`). A frame marked done thus
survives a power cut on a local file system; zarr's writes are atomic renames, so a chunk is
either the old or the new one, never a mix.
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import time
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

from volrecon.errors import ConfigError, InputFileError, StoreMismatchError
from volrecon.io.ome_zarr import (
    IMAGE_PATH,
    chunk_codecs,
    create_ome_image,
    parse_ome_image,
    shard_shape,
)
from volrecon.io.zarr_groups import group_attributes
from volrecon.pipeline.journal import journal_path, journal_paths, read_journal
from volrecon.pipeline.shards import frame_files, shard_count, shard_frames_of

__all__ = [
    "DIAGNOSTICS",
    "FORMAT_VERSION",
    "PROJECTIONS",
    "READABLE_FORMATS",
    "STATUS_DONE",
    "STATUS_FAILED",
    "STATUS_PENDING",
    "STORE_ATTRIBUTE",
    "FrameRecords",
    "JobStore",
    "creation_interrupted",
    "fsync_tree",
    "is_job_store",
    "is_vacant",
    "level_paths",
    "max_projections",
    "store_file_count",
]

#: Layout version written: 2 = every chunk carries a CRC32C checksum; 3 = the frame arrays may
#: be sharded (attribute ``shard_frames``; 1 is the format 2 layout).
FORMAT_VERSION = 3
#: Versions opened, resumed and verified (format 1 stores have no checksums: a resumed one
#: keeps its arrays' codecs, and verify then finds only chunks that do not decode; format 1
#: and 2 stores keep one file per chunk when resumed).
READABLE_FORMATS = (1, 2, 3)
STORE_ATTRIBUTE = "volrecon"
STATUS_PENDING, STATUS_DONE, STATUS_FAILED = 0, 1, 2
STATUS_NAMES = {STATUS_PENDING: "pending", STATUS_DONE: "done", STATUS_FAILED: "failed"}
#: Diagnostics arrays: name -> (dtype, fill value). ``status`` is written last.
DIAGNOSTICS: dict[str, tuple[str, Any]] = {
    "iterations": ("int32", 0),
    "objective": ("float64", np.nan),
    "residual": ("float64", np.nan),
    "converged": ("bool", False),
    "seconds": ("float32", np.nan),
    "status": ("uint8", STATUS_PENDING),
}
#: Projection arrays: name -> (axis reduced in (Z, Y, X), dimension names).
PROJECTIONS: dict[str, tuple[int, tuple[str, ...]]] = {
    "max_z": (0, ("t", "y", "x")),
    "max_y": (1, ("t", "z", "x")),
    "max_x": (2, ("t", "z", "y")),
}
#: Frames per chunk of the diagnostics arrays (written by one process only).
DIAGNOSTICS_CHUNK = 4096
#: What zarr raises on damaged metadata or chunks (a codec error is a RuntimeError).
DAMAGE_ERRORS: tuple[type[Exception], ...] = (KeyError, ValueError, TypeError, RuntimeError,
                                              IndexError, AttributeError)
_PARTIAL = re.compile(r"^.+\.[0-9a-f]{32}\.partial$")
_DAMAGED_FIX = "restore the store from a copy, or re-run the job with --restart to start over"
_CHUNK_FIX = ("run 'volrecon verify {path}' to mark the frames it holds for recomputation, or "
              "re-run the job with --restart to start over")


def max_projections(volume_zyx: np.ndarray) -> dict[str, np.ndarray]:
    """Maximum-intensity projections of one volume along z, y and x (NaN if any voxel is)."""
    return {name: np.max(volume_zyx, axis=axis) for name, (axis, _) in PROJECTIONS.items()}


@dataclass(frozen=True)
class FrameRecords:
    """What a task reports for its frames ``start:stop`` (store frame indices).

    Attributes
    ----------
    start, stop : int
        Frame range.
    iterations, objective, residual, converged, seconds, status : ndarray of shape (n,)
        Per-frame diagnostics (see :data:`DIAGNOSTICS`).
    failures : dict of int to str
        Reason for each failed frame.
    """

    start: int
    stop: int
    iterations: np.ndarray
    objective: np.ndarray
    residual: np.ndarray
    converged: np.ndarray
    seconds: np.ndarray
    status: np.ndarray
    failures: dict[int, str] = field(default_factory=dict)


def _readable_attributes(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The attributes of the group at `path`; empty if it is none or its metadata is damaged
    (nothing then shows that the folder is a job's store)."""
    try:
        return group_attributes(path) or {}
    except InputFileError:
        return {}


def is_job_store(path: str | os.PathLike[str]) -> bool:
    """True when `path` is a zarr group written by a volrecon job (complete or not).

    False for a group whose ``zarr.json`` is damaged: nothing shows it is a job's store.
    """
    return STORE_ATTRIBUTE in _readable_attributes(path)


def creation_interrupted(path: str | os.PathLike[str]) -> bool:
    """True when `path` is a volrecon output store whose creation never finished."""
    attribute = _readable_attributes(path).get(STORE_ATTRIBUTE)
    return isinstance(attribute, dict) and "state" in attribute and attribute["state"] != "ready"


def is_vacant(path: str | os.PathLike[str]) -> bool:
    """True when `path` is an empty folder, or holds only temporary files of zarr writes.

    A run killed while writing a new store's first file leaves just that temporary file.
    """
    try:
        entries = list(Path(path).iterdir())
    except OSError:
        return False
    return all(entry.is_file() and _PARTIAL.match(entry.name) for entry in entries)


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")


class JobStore:
    """A job's output store, opened by the one process allowed to write its metadata.

    Create with :meth:`create` or :meth:`open`; the tasks write volume chunks through
    :class:`volrecon.pipeline.task.FrameWriter`, this object writes the rest.

    Attributes
    ----------
    path : Path
        The store directory.
    group : zarr.Group
        Its root group.
    """

    def __init__(self, path: Path, group: Any) -> None:
        import zarr

        self.path = path
        self.group: Any = group
        arrays = {}
        projections = ([f"projections/{name}" for name in PROJECTIONS]
                       if "projections" in group else [])
        levels = level_paths(group, path)
        for key in (IMAGE_PATH, *levels, *projections,
                    *(f"diagnostics/{name}" for name in DIAGNOSTICS)):
            try:
                arrays[key] = group[key]
            except DAMAGE_ERRORS as exc:
                raise InputFileError(
                    f"{path}: array '{key}' is missing or its metadata is damaged "
                    f"({type(exc).__name__}); {_DAMAGED_FIX}"
                ) from exc
            if not isinstance(arrays[key], zarr.Array):
                raise InputFileError(f"{path}: '{key}' is not an array; {_DAMAGED_FIX}")
        self._diagnostics = {name: arrays[f"diagnostics/{name}"] for name in DIAGNOSTICS}
        self._frame_arrays = {key: arrays[key] for key in (IMAGE_PATH, *levels, *projections)}

    # ------------------------------------------------------------------------- lifecycle
    @classmethod
    def create(cls, path: str | os.PathLike[str], *, shape_zyx: tuple[int, int, int],
               n_frames: int, scale_tzyx: tuple[float, float, float, float],
               metadata: dict[str, Any], projections: bool = False,
               compression_level: int = 3, depth_start_um: float = 0.0,
               shard_frames: int = 1, levels: int = 1, dtype: str = "float32") -> JobStore:
        """Create a new store (`path` must not exist or be an empty folder).

        The ``volrecon`` attribute is first written with ``state = "creating"`` and set to
        ``"ready"`` once every array exists, so a store interrupted while being created is
        recognised and made again on the next run.

        Parameters
        ----------
        depth_start_um : float
            Depth of plane 0 (an OME translation along z when not 0).
        metadata : dict
            JSON-able job attributes (settings, fingerprints, provenance) stored under
            ``attributes["volrecon"]``.
        shard_frames : int
            Frames per file of the volume and the projections (zarr v3 shards of one-frame
            inner chunks); 1: one file per chunk.
        levels : int
            Resolution levels of the image (arrays ``"0"`` … ``"levels - 1"``, each the 2 × 2
            lateral mean of the one above, written with every frame by the tasks).
        dtype : {"float32", "float16"}
            Element type of the levels and projections.
        """
        import zarr

        path = Path(path)
        if path.is_dir() and is_vacant(path):
            shutil.rmtree(path)
        attributes = {"format_version": FORMAT_VERSION, "state": "creating",
                      "shard_frames": shard_frames, **metadata}
        group: Any = create_ome_image(path, shape_tzyx=(n_frames, *shape_zyx),
                                 scale_tzyx=scale_tzyx, name="volumes",
                                 translation_tzyx=(0.0, depth_start_um, 0.0, 0.0),
                                 compression_level=compression_level,
                                 attributes={STORE_ATTRIBUTE: _json(attributes)},
                                 shard_frames=shard_frames, levels=levels, dtype=dtype)
        chunk = min(n_frames, DIAGNOSTICS_CHUNK)
        diagnostics = group.create_group("diagnostics", attributes={
            "failures": {}, "status_codes": {str(k): v for k, v in STATUS_NAMES.items()}})
        for name, (record_dtype, fill) in DIAGNOSTICS.items():
            diagnostics.create_array(name, shape=(n_frames,), chunks=(chunk,),
                                     dtype=record_dtype,
                                     fill_value=fill, compressors=chunk_codecs(3),
                                     dimension_names=["t"])
        if projections:
            group_p = group.create_group("projections")
            nz, ny, nx = shape_zyx
            sizes = {"t": n_frames, "z": nz, "y": ny, "x": nx}
            for name, (_, dims) in PROJECTIONS.items():
                shape = tuple(sizes[d] for d in dims)
                chunks = (1, *shape[1:])
                group_p.create_array(name, shape=shape, chunks=chunks,
                                     shards=shard_shape(chunks, shape,
                                                        shard_frames=shard_frames),
                                     dtype=dtype, fill_value=np.nan,
                                     compressors=chunk_codecs(compression_level),
                                     dimension_names=list(dims))
        attributes["state"] = "ready"
        group.attrs[STORE_ATTRIBUTE] = _json(attributes)
        return cls(path, zarr.open_group(zarr.storage.LocalStore(path), mode="r+"))

    @classmethod
    def open(cls, path: str | os.PathLike[str], *, mode: Literal["r", "r+"] = "r+") -> JobStore:
        """Open an existing, completely created store.

        Raises
        ------
        InputFileError
            If `path` is not a volrecon output store, its metadata is damaged, it is of
            another format version, or its creation was interrupted.
        """
        import zarr

        path = Path(path)
        try:
            group_attrs = group_attributes(path)
        except InputFileError as exc:
            raise InputFileError(
                f"{path}: the store's metadata (zarr.json) is damaged "
                f"({type(exc.__cause__).__name__}); {_DAMAGED_FIX}"
            ) from exc
        if group_attrs is None or STORE_ATTRIBUTE not in group_attrs:
            raise InputFileError(
                f"{path}: not a volrecon output store (no '{STORE_ATTRIBUTE}' attribute); give "
                "the [output] path of a job"
            )
        attributes = group_attrs[STORE_ATTRIBUTE]
        if not isinstance(attributes, dict):
            raise InputFileError(
                f"{path}: attribute '{STORE_ATTRIBUTE}' is not a table; {_DAMAGED_FIX}")
        if attributes.get("format_version") not in READABLE_FORMATS:
            raise InputFileError(
                f"{path}: output store format {attributes.get('format_version')} is not one "
                f"this volrecon reads ({', '.join(map(str, READABLE_FORMATS))}); use a "
                "matching volrecon"
            )
        if attributes.get("state") != "ready":
            raise InputFileError(
                f"{path}: the store's creation was interrupted; run the job again to create it"
            )
        group = zarr.open_group(zarr.storage.LocalStore(path, read_only=mode == "r"), mode=mode)
        return cls(path, group)

    @staticmethod
    def wipe(path: str | os.PathLike[str]) -> None:
        """Delete a volrecon output store (refuses any other folder).

        Raises
        ------
        ConfigError
            If `path` exists and is neither an empty folder nor a volrecon output store.
        """
        path = Path(path)
        if not path.exists():
            return
        if path.is_dir() and is_vacant(path):
            return
        if not is_job_store(path):
            raise ConfigError(
                f"{path}: exists and is not a volrecon output store; choose another "
                "[output] path (volrecon only ever deletes its own stores)"
            )
        shutil.rmtree(path)

    # ------------------------------------------------------------------------ attributes
    @property
    def attributes(self) -> dict[str, Any]:
        """The ``volrecon`` group attribute (settings, fingerprints, provenance)."""
        return dict(self.group.attrs[STORE_ATTRIBUTE])

    def update_attributes(self, **changes: Any) -> None:
        """Replace top-level entries of the ``volrecon`` attribute (atomic file write)."""
        attributes = self.attributes
        attributes.update(changes)
        self.group.attrs[STORE_ATTRIBUTE] = _json(attributes)

    @property
    def n_frames(self) -> int:
        """Frames T of the image."""
        return int(self.image.shape[0])

    @property
    def shard_frames(self) -> int:
        """Frames per file of the volume (1 when not sharded, as in format 1 and 2 stores)."""
        return shard_frames_of(self.image)

    @property
    def image(self) -> Any:
        """The ``(T, Z, Y, X)`` zarr image array."""
        return self.group[IMAGE_PATH]

    def check_settings(self, comparable: dict[str, Any], *, job_source: str) -> None:
        """Refuse to resume with other settings than the store's.

        Raises
        ------
        StoreMismatchError
            Naming the first setting that differs, both values and the two ways out.
        """
        stored = self.attributes.get("comparable_settings", {})
        difference = _first_difference(stored, comparable)
        if difference is None:
            return
        key, old, new = difference
        if key in ("video.dark", "video.flat") and (old is None or new is None):
            what = (f"the store was made {'without' if old is None else 'with'} '{key}' but "
                    f"{job_source} {'sets' if old is None else 'does not set'} it")
            fix = f"{'remove' if old is None else 'set'} '{key}' to resume"
        elif key.endswith(".path") or key in ("video.dark", "video.flat"):
            what = (f"the file behind '{key}' is not the one the store was made from "
                    f"(fingerprint {_short(old)} in the store, {_short(new)} now)")
            fix = "point it at the original file to resume"
        else:
            what = f"setting '{key}' is {_show(old)} in the store but {_show(new)} in {job_source}"
            fix = f"set {key.rsplit('.', 1)[-1]} = {_show(old)} to resume" if old is not None \
                else f"remove '{key}' to resume"
        raise StoreMismatchError(
            f"{self.path}: {what}; {fix}, or re-run with --restart to start over"
        )

    # ------------------------------------------------------------------------ frames
    def status(self) -> np.ndarray:
        """Per-frame status codes ``(T,)`` (0 pending, 1 done, 2 failed).

        Raises
        ------
        InputFileError
            If the status array cannot be read back (a damaged chunk).
        """
        try:
            status = np.asarray(self._diagnostics["status"][:])
        except DAMAGE_ERRORS as exc:
            raise InputFileError(
                f"{self.path}: array 'diagnostics/status' (the record of finished frames) "
                f"cannot be read ({exc}); {_CHUNK_FIX.format(path=self.path)}"
            ) from exc
        if status.shape != (self.n_frames,) or status.dtype != np.uint8:
            raise InputFileError(
                f"{self.path}: array 'diagnostics/status' has shape {status.shape} and dtype "
                f"{status.dtype}, expected ({self.n_frames},) uint8; {_DAMAGED_FIX}"
            )
        return status

    def failures(self) -> dict[int, str]:
        """Reason of each failed frame."""
        raw = self.group["diagnostics"].attrs.get("failures", {})
        if not isinstance(raw, dict):
            return {}
        return {int(k): str(v) for k, v in raw.items() if str(k).isdigit()}

    def record(self, records: FrameRecords) -> None:
        """Write a finished task's diagnostics; ``status`` last, marking its frames done.

        Call only after the task's volumes are written (the task returns after writing).
        The frames' volume and projection chunks are flushed to disk first (fsync of the files
        and their folders), then the diagnostics, then the status chunk, so a frame recorded
        done has all its data on disk.

        Raises
        ------
        InputFileError
            If a diagnostics chunk this write must merge into is damaged.
        """
        region = slice(records.start, records.stop)
        self.sync(dict.fromkeys(path for t in range(records.start, records.stop)
                                for path in self.frame_chunk_paths(t)))
        try:
            for name in DIAGNOSTICS:
                if name != "status":
                    self._diagnostics[name][region] = getattr(records, name)
        except DAMAGE_ERRORS as exc:
            raise InputFileError(
                f"{self.path}: a chunk of 'diagnostics/{name}' holding frames "
                f"{records.start}:{records.stop} cannot be read ({exc}); "
                f"{_CHUNK_FIX.format(path=self.path)}"
            ) from exc
        old = self.failures()
        failures = {t: reason for t, reason in old.items()
                    if not records.start <= t < records.stop}
        failures.update(records.failures)
        if failures != old:
            self._set_failures(failures)
        self.sync([*self.diagnostics_chunk_paths(region, skip=("status",)),
                   self.path / "diagnostics" / "zarr.json"])
        self._diagnostics["status"][region] = records.status
        self.sync(self.diagnostics_chunk_paths(region, only=("status",)))

    def committed_status(self) -> np.ndarray:
        """:meth:`status` with the frames that running (or killed) tasks have committed in
        their journals (:mod:`volrecon.pipeline.journal`) but the driver has not yet
        recorded: what a kill at this moment would keep."""
        status = self.status()
        for path in journal_paths(self.path):
            for entry in read_journal(path):
                if 0 <= int(entry["t"]) < len(status):
                    status[int(entry["t"])] = int(entry["status"])
        return status

    def absorb_journals(self) -> list[FrameRecords]:
        """Record every frame committed in a task journal (:meth:`record`), then delete the
        journal; returns what was recorded. Only the driver calls this, when no task of its
        run is still writing (at a run's start and end)."""
        recorded = []
        for path in journal_paths(self.path):
            for records in _journal_records(read_journal(path), self.n_frames):
                self.record(records)
                recorded.append(records)
            path.unlink(missing_ok=True)
        return recorded

    def drop_journal(self, start: int, stop: int) -> None:
        """Delete the journal of the task of frames ``start:stop`` (after :meth:`record`)."""
        journal_path(self.path, start, stop).unlink(missing_ok=True)

    def mark_pending(self, frames: Iterable[int], *,
                     damaged_chunks: Iterable[str | os.PathLike[str]] = ()) -> None:
        """Mark `frames` pending so the next run recomputes them, and delete damaged chunks.

        Chunk files of the ``status`` array among `damaged_chunks` are deleted first (their
        frames read as pending then); the status record of `frames` is written and flushed
        next, their failure reasons dropped, and only then the other damaged chunk files are
        deleted, so a crash in between leaves frames pending, never done without data.
        Diagnostics chunks are shared by many frames: the caller marks all of theirs pending.

        Parameters
        ----------
        frames : iterable of int
            Store frame indices.
        damaged_chunks : iterable of paths
            Chunk files inside the store that cannot be read.
        """
        frames = sorted(set(int(t) for t in frames))
        chunks = [Path(c) for c in damaged_chunks]
        status_folder = self.path / "diagnostics" / "status"
        first = [c for c in chunks if status_folder in c.parents]
        _delete(first)
        self.sync(first)
        if frames:
            status = self.status()
            status[frames] = STATUS_PENDING
            region = slice(frames[0], frames[-1] + 1)
            self._diagnostics["status"][region] = status[region]
            self.sync(self.diagnostics_chunk_paths(region, only=("status",)))
            old = self.failures()
            failures = {t: reason for t, reason in old.items() if t not in set(frames)}
            if failures != old:
                self._set_failures(failures)
                self.sync([self.path / "diagnostics" / "zarr.json"])
        rest = [c for c in chunks if c not in first]
        _delete(rest)
        self.sync(rest)

    def _set_failures(self, failures: dict[int, str]) -> None:
        self.group["diagnostics"].attrs["failures"] = {
            str(k): v for k, v in sorted(failures.items())}

    # ------------------------------------------------------------------------ chunk files
    def frame_arrays(self) -> dict[str, Any]:
        """The arrays with one chunk row per frame: ``"0"`` and the projections, by path."""
        return dict(self._frame_arrays)

    def diagnostics_arrays(self) -> dict[str, Any]:
        """The diagnostics arrays, by name (:data:`DIAGNOSTICS`)."""
        return dict(self._diagnostics)

    def chunk_path(self, array: Any, coords: tuple[int, ...]) -> Path:
        """The file of chunk `coords` (chunk-grid indices) of `array`."""
        return self.path.joinpath(*array.path.split("/"),
                                  *array.metadata.encode_chunk_key(coords).split("/"))

    def frame_chunk_paths(self, t: int) -> list[Path]:
        """The files holding frame `t` in every frame array (whether they exist or not: a
        chunk equal to the fill value is never written): its chunks, or the shard file of a
        sharded array (:func:`volrecon.pipeline.shards.frame_files`)."""
        return [path for array in self.frame_arrays().values()
                for path in frame_files(self.path, array, t)]

    def diagnostics_chunk_paths(self, region: slice, *, only: Iterable[str] | None = None,
                                skip: Iterable[str] = ()) -> list[Path]:
        """The chunk files of the diagnostics arrays that hold frames ``region``."""
        names = [n for n in (DIAGNOSTICS if only is None else only) if n not in set(skip)]
        paths = []
        for name in names:
            array = self._diagnostics[name]
            step = int(array.chunks[0])
            paths += [self.chunk_path(array, (c,))
                      for c in range(region.start // step, (region.stop - 1) // step + 1)]
        return paths

    def sync(self, paths: Iterable[Path]) -> None:
        """fsync each existing file of `paths`, then each folder from theirs up to the store
        (new folders' entries live in their parents)."""
        fsync_tree(paths, self.path)

    def diagnostics(self) -> dict[str, np.ndarray]:
        """All per-frame diagnostics as arrays ``(T,)``."""
        return {name: np.asarray(array[:]) for name, array in self._diagnostics.items()}

    def remove_partial_files(self) -> int:
        """Delete ``*.partial`` files left by writers killed mid-write; returns how many."""
        removed = 0
        for partial in self.path.rglob("*.partial"):
            try:
                partial.unlink()
                removed += 1
            except FileNotFoundError:
                pass
        return removed


def store_file_count(n_frames: int, shape_zyx: tuple[int, int, int], *, shard_frames: int,
                     projections: bool, levels: int = 1, dtype: str = "float32") -> int:
    """Files of a finished store of `n_frames` frames (what ``--estimate`` reports).

    Frame arrays (every level, every projection) hold ``ceil(T / shard_frames)`` files each
    (sharded), or one per chunk (``shard_frames = 1``; a level may be split along z,
    :func:`volume_chunks`); each diagnostics array one per 4096 frames; plus one
    ``zarr.json`` per group and array. Frames that failed (all NaN) leave chunks out, so this
    is an upper bound.

    Examples
    --------
    >>> store_file_count(108_000, (32, 256, 256), shard_frames=32, projections=True)
    13675
    """
    from volrecon.io.ome_zarr import level_shape, volume_chunks

    itemsize = np.dtype(dtype).itemsize
    n_projections = len(PROJECTIONS) if projections else 0
    if shard_frames > 1:
        frame_files = (levels + n_projections) * shard_count(n_frames, shard_frames)
    else:
        per_frame = 0
        for k in range(levels):
            ny, nx = level_shape(shape_zyx, k)[1:]
            planes = volume_chunks((shape_zyx[0], ny, nx), itemsize=itemsize)[1]
            per_frame += math.ceil(shape_zyx[0] / planes)
        frame_files = n_frames * (per_frame + n_projections)
    diagnostics = len(DIAGNOSTICS) * math.ceil(n_frames / DIAGNOSTICS_CHUNK)
    metadata = 1 + levels + 1 + len(DIAGNOSTICS) + ((1 + n_projections) if projections else 0)
    return frame_files + diagnostics + metadata


# ------------------------------------------------------------------------------- helpers
def _level_count(attributes: dict[str, Any], path: str | os.PathLike[str]) -> int:
    """Resolution levels of a store's image (its OME-NGFF multiscale's datasets)."""
    try:
        return len(parse_ome_image(attributes, source=path).levels)
    except InputFileError:
        return 1  # the image array's own checks name the damage


def level_paths(group: Any, path: str | os.PathLike[str]) -> list[str]:
    """Array paths of the image's lower resolution levels (``["1", "2", …]``; empty for a
    one-level store)."""
    return [str(level) for level in range(1, _level_count(group.attrs.asdict(), path))]


def _journal_records(entries: list[dict[str, Any]], n_frames: int) -> list[FrameRecords]:
    """Journal entries as :class:`FrameRecords`, one per run of consecutive frames (the last
    entry of a frame wins)."""
    by_frame = {int(e["t"]): e for e in entries if 0 <= int(e["t"]) < n_frames}
    frames = sorted(by_frame)
    runs: list[list[int]] = []
    for t in frames:
        if runs and runs[-1][-1] == t - 1:
            runs[-1].append(t)
        else:
            runs.append([t])
    out = []
    for run in runs:
        values = {name: np.array([by_frame[t][name] for t in run], dtype=dtype)
                  for name, (dtype, _) in DIAGNOSTICS.items()}
        failures = {t: str(by_frame[t]["failure"]) for t in run
                    if by_frame[t].get("failure") is not None}
        out.append(FrameRecords(start=run[0], stop=run[-1] + 1, failures=failures, **values))
    return out


def _delete(paths: Iterable[Path]) -> None:
    for path in paths:
        path.unlink(missing_ok=True)


def fsync_tree(paths: Iterable[Path], root: Path) -> None:
    """fsync the files of `paths` that exist, then every folder from theirs up to `root`.

    The calls run side by side in a few threads: a journaling file system then commits them
    together instead of one journal commit after the other; each is still a full fsync.
    """
    from concurrent.futures import ThreadPoolExecutor

    targets: list[Path] = []
    folders: set[Path] = set()
    for path in paths:
        targets.append(path)
        folder = path.parent
        while folder not in folders and (folder == root or root in folder.parents):
            folders.add(folder)
            folder = folder.parent
    targets += sorted(folders)
    if len(targets) <= 2:
        for target in targets:
            _fsync(target)
        return
    with ThreadPoolExecutor(min(16, len(targets)), thread_name_prefix="volrecon-fsync") as pool:
        for _ in pool.map(_fsync, targets):
            pass


def _fsync(path: Path) -> None:
    """fsync one file or folder; nothing if it does not exist (a chunk never written)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except (FileNotFoundError, NotADirectoryError):
        return
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _json(value: Any) -> Any:
    """A JSON-safe deep copy (tuples become lists, numpy scalars plain numbers)."""
    return json.loads(json.dumps(value, default=_json_default))


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    raise TypeError(f"{type(value).__name__} is not JSON-able")


def _first_difference(old: Any, new: Any, prefix: str = "") -> tuple[str, Any, Any] | None:
    old, new = _json(old), _json(new)
    if isinstance(old, Mapping) and isinstance(new, Mapping):
        for key in sorted(set(old) | set(new)):
            where = f"{prefix}.{key}" if prefix else str(key)
            if key not in old:
                return (where, None, new[key])
            if key not in new:
                return (where, old[key], None)
            found = _first_difference(old[key], new[key], where)
            if found is not None:
                return found
        return None
    if isinstance(old, float) and isinstance(new, float) and math.isnan(old) and math.isnan(new):
        return None
    return None if old == new else (prefix, old, new)


def _show(value: Any) -> str:
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "(not set)"
    return json.dumps(value)


def _short(fingerprint: Any) -> str:
    text = str(fingerprint)
    return text if len(text) <= 24 else text[:24] + "…"
