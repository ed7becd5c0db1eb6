"""Whole-shard writes of a job's frame arrays (store format 3).

A sharded array keeps ``shard_frames`` frames in one file: the frames' inner chunks (one frame
each, encoded exactly as an unsharded chunk: bytes, zstd, crc32c) one after the other, then the
shard index (offset and length of every inner chunk, its own crc32c), as the zarr v3 sharding
codec lays it out. zarr itself can only write a shard from all its frames at once in memory,
uncompressed; :class:`ShardBuffer` instead encodes each frame's inner chunks when the frame is
finished (through zarr's own codecs, on an in-memory array), keeps only those compressed bytes,
and writes the shard file once its last frame is in, through the array's own zarr store (a
temporary name, then a rename), so the file is always either the old shard or the new one.
The task that owns a shard's frames is its only writer (:func:`volrecon.pipeline.plan.plan_tasks`
never splits a shard).
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.errors import ConfigError

__all__ = ["FrameWriter", "ShardBuffer", "frame_files", "is_sharded", "shard_count",
           "shard_file", "shard_frames_of"]

#: An inner chunk that holds nothing (only the fill value): offset and length both 2**64 - 1.
_EMPTY = np.uint64(2**64 - 1)


def is_sharded(array: Any) -> bool:
    """True when `array` (a zarr v3 array) is written in shards."""
    return getattr(array, "shards", None) is not None


def shard_frames_of(array: Any) -> int:
    """Frames per file of `array`: its shard's length along t (1 when not sharded)."""
    return int(array.shards[0]) if is_sharded(array) else 1


def shard_file(store_path: str | os.PathLike[str], array: Any, t: int) -> Path:
    """The file holding frame `t` of a sharded `array` (whether it exists or not)."""
    coords = (t // shard_frames_of(array), *(0,) * (array.ndim - 1))
    return Path(store_path).joinpath(*array.path.split("/"),
                                     *array.metadata.encode_chunk_key(coords).split("/"))


def frame_files(store_path: str | os.PathLike[str], array: Any, t: int) -> list[Path]:
    """The files holding frame `t` of the frame array `array` (whether they exist or not: a
    chunk equal to the fill value is never written): its chunks, or its shard file."""
    if is_sharded(array):
        return [shard_file(store_path, array, t)]
    root = Path(store_path).joinpath(*array.path.split("/"))
    return [root.joinpath(*array.metadata.encode_chunk_key((t, *rest)).split("/"))
            for rest in np.ndindex(*array.cdata_shape[1:])]


def _memory_array(shape: tuple[int, ...], chunks: tuple[int, ...], dtype: Any, fill: Any,
                  codecs: tuple[Any, ...], *, write_empty: bool) -> tuple[Any, dict[str, Any]]:
    """An in-memory zarr array encoding its chunks with `codecs` (serializer first)."""
    import zarr

    contents: dict[str, Any] = {}
    array = zarr.create_array(zarr.storage.MemoryStore(contents), shape=shape, chunks=chunks,
                              dtype=dtype, fill_value=fill, serializer=codecs[0],
                              compressors=list(codecs[1:]), filters=None,
                              config={"write_empty_chunks": write_empty})
    return array, contents


def _morton_order(grid: tuple[int, ...]) -> list[tuple[int, ...]]:
    """Every index of `grid` by its Morton code (bits interleaved, axis 0 the lowest).

    Examples
    --------
    >>> _morton_order((3, 2))
    [(0, 0), (1, 0), (0, 1), (1, 1), (2, 0), (2, 1)]
    """
    bits = max(1, max(grid) - 1).bit_length()

    def code(index: tuple[int, ...]) -> int:
        return sum(((value >> bit) & 1) << (bit * len(grid) + axis)
                   for bit in range(bits) for axis, value in enumerate(index))

    return sorted(np.ndindex(*grid), key=code)


class ShardBuffer:
    """The encoded frames of one shard of `array`, written as one file once all are in.

    Parameters
    ----------
    store_path : str or path
        The store's folder (a local file system).
    array : zarr.Array
        A sharded frame array of the store, shape ``(T, ...)``.
    shard : int
        Shard index along t: frames ``shard * S`` to ``min((shard + 1) * S, T)``.

    Raises
    ------
    ConfigError
        If `array` is not sharded with its index at the end of the file (how volrecon
        creates its arrays).
    """

    def __init__(self, store_path: str | os.PathLike[str], array: Any, shard: int) -> None:
        from zarr.codecs import ShardingCodec

        codec = array.metadata.codecs[0] if is_sharded(array) else None
        if not isinstance(codec, ShardingCodec) or codec.index_location.value != "end":
            raise ConfigError(f"{store_path}: array '{array.path}' is not sharded with its "
                              "index at the end; re-run the job with --restart")
        self.path = shard_file(store_path, array, shard * shard_frames_of(array))
        self._store = array.store_path.store
        coords = (shard, *(0,) * (array.ndim - 1))
        self._key = f"{array.path}/{array.metadata.encode_chunk_key(coords)}"
        self.start = shard * shard_frames_of(array)
        self.stop = min(self.start + shard_frames_of(array), int(array.shape[0]))
        self._shard_shape = tuple(int(n) for n in array.shards)
        self._inner = tuple(int(n) for n in codec.chunk_shape)
        self._grid = tuple(s // c for s, c in zip(self._shard_shape, self._inner, strict=True))
        self._index_codecs = tuple(codec.index_codecs)
        self._encoder, self._chunks = _memory_array(
            self._shard_shape, self._inner, array.dtype, array.fill_value,
            tuple(codec.codecs), write_empty=False)
        self._frame_shape = tuple(int(n) for n in array.shape[1:])
        self._added: set[int] = set()

    @property
    def complete(self) -> bool:
        """True once every frame of the shard inside the array has been added."""
        return len(self._added) == self.stop - self.start

    def add(self, t: int, frame: np.ndarray) -> None:
        """Encode frame `t` (shape ``array.shape[1:]``); only its compressed bytes are kept."""
        if not self.start <= t < self.stop or frame.shape != self._frame_shape:
            raise ValueError(f"frame {t} of shape {frame.shape} is not one of frames "
                             f"{self.start}:{self.stop} of shape {self._frame_shape}")
        region = (t - self.start, *(slice(0, n) for n in self._frame_shape))
        self._encoder[region] = frame
        self._added.add(t)

    def encode(self) -> bytes:
        """The shard file's bytes: the inner chunks, then the encoded index."""
        index = np.full((*self._grid, 2), _EMPTY, dtype=np.uint64)
        parts: list[bytes] = []
        offset = 0
        # Inner chunks in Morton (Z-curve) order, as zarr's own sharding codec writes them;
        # any order reads back (the index holds every offset), this one gives the same bytes.
        for coords in _morton_order(self._grid):
            key = "c/" + "/".join(str(c) for c in coords)
            buffer = self._chunks.get(key)
            if buffer is None:
                continue
            data = buffer.to_bytes()
            index[coords] = (offset, len(data))
            parts.append(data)
            offset += len(data)
        encoder, contents = _memory_array(index.shape, index.shape, np.uint64, 0,
                                          self._index_codecs, write_empty=True)
        encoder[...] = index
        parts.append(contents["c/" + "/".join("0" * index.ndim)].to_bytes())
        return b"".join(parts)

    @property
    def added(self) -> list[int]:
        """Frames added so far, in order."""
        return sorted(self._added)

    def write(self, *, partial: bool = False) -> Path:
        """Write the shard file through the array's zarr store, whole and atomically (zarr's
        LocalStore writes a temporary ``*.partial`` file, then renames it over the shard).

        Parameters
        ----------
        partial : bool
            Write the frames added so far (the others read as the fill value, NaN) so that
            a kill keeps them; the complete shard is written again later, whole.

        Raises
        ------
        ValueError
            If a frame of the shard was never added and `partial` is false (the shard would
            lose it).
        """
        from zarr.core.buffer import default_buffer_prototype
        from zarr.core.sync import sync

        if not (self.complete or partial):
            missing = sorted(set(range(self.start, self.stop)) - self._added)
            raise ValueError(f"{self.path}: frames {missing} of the shard were never written")
        buffer = default_buffer_prototype().buffer.from_bytes(self.encode())
        sync(self._store.set(self._key, buffer))
        return self.path


def shard_count(n_frames: int, shard_frames: int) -> int:
    """Shard files along t of an array of `n_frames` frames."""
    return math.ceil(n_frames / max(1, shard_frames))


class FrameWriter:
    """Writes a task's frames of one frame array: chunk by chunk, or whole shard files.

    A sharded array's frames are encoded as they come and each shard file is written,
    atomically, when its last frame is in (:class:`ShardBuffer`), and on :meth:`flush`
    with the frames it has so far; the task must cover whole shards
    (:func:`~volrecon.pipeline.plan.plan_tasks`).
    """

    def __init__(self, store_path: str, array: Any) -> None:
        self._store_path = store_path
        self._array = array
        self._shard_frames = shard_frames_of(array)
        self._buffer: ShardBuffer | None = None
        self._flushed: set[int] = set()  # frames of the open shard already on disk

    def write(self, t: int, frame: np.ndarray) -> list[int]:
        """Write frame `t` (or keep it encoded until its shard is complete); return the
        frames whose files this call wrote (``[t]``, a whole shard's frames, or none yet)."""
        if not is_sharded(self._array):
            self._array[t] = frame
            return [t]
        if self._buffer is None:
            self._buffer = ShardBuffer(self._store_path, self._array, t // self._shard_frames)
        self._buffer.add(t, frame)
        if not self._buffer.complete:
            return []
        self._buffer.write()
        written = [f for f in range(self._buffer.start, self._buffer.stop)
                   if f not in self._flushed]
        self._buffer, self._flushed = None, set()
        return written

    def flush(self) -> list[int]:
        """Write the open shard with the frames it has so far (:meth:`ShardBuffer.write`
        with ``partial``); return the frames that this put on disk for the first time."""
        if self._buffer is None:
            return []
        new = [f for f in self._buffer.added if f not in self._flushed]
        if new:
            self._buffer.write(partial=True)
            self._flushed.update(new)
        return new

    def files(self, t: int) -> list[Path]:
        """The files holding frame `t` of this array (:func:`frame_files`)."""
        return frame_files(self._store_path, self._array, t)

    def check_written(self) -> None:
        """Raise if a shard was left incomplete (the task did not cover whole shards)."""
        if self._buffer is not None:
            self._buffer.write()  # raises ValueError naming the frames never added
