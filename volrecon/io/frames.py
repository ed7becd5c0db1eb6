"""Lazy readers of raw camera video: a multi-page (Big)TIFF, a glob of TIFFs, a zarr array.

Every reader is a small frozen object that holds paths and the frame shape and dtype only. It
opens its file inside :meth:`FrameSource.read`, so a reader pickles and each dask task (in a
thread, a process or on a cluster node) reads just its own frames. Opening a reader checks the
file once: shape, dtype and, for TIFF, that the file is not truncated.
"""

from __future__ import annotations

import glob
import logging
import os
import re
import struct
from abc import ABC, abstractmethod
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import InputFileError, ShapeError
from volrecon.io.tiff import capture_tifffile_log, tiff_page_problem

if TYPE_CHECKING:
    import dask.array as da

__all__ = [
    "FrameSource",
    "TiffFrames",
    "TiffGlobFrames",
    "ZarrFrames",
    "natural_sort_key",
    "open_frames",
    "read_image",
]

#: Exceptions a damaged TIFF raises (TiffFileError is a ValueError; a cut header a struct.error;
#: nonsense tag values give IndexError, TypeError, ZeroDivisionError or RuntimeError
#: ("incompatible keyframe") deep in tifffile, or fail one of its internal asserts; codec
#: errors are RuntimeErrors).
_TIFF_ERRORS: tuple[type[BaseException], ...] = (ValueError, struct.error, OSError, KeyError,
                                                 IndexError, TypeError, ArithmeticError,
                                                 RuntimeError, AssertionError)
_READ_ERRORS: tuple[type[BaseException], ...] = _TIFF_ERRORS
_GLOB_CHARACTERS = frozenset("*?[")


@dataclass(frozen=True)
class FrameSource(ABC):
    """A read-only sequence of camera frames ``(T, Y, X)``.

    Attributes
    ----------
    shape : tuple of int
        ``(T, Y, X)``: frames, rows, columns.
    dtype : numpy dtype
        The pixel type as stored (native byte order).
    """

    shape: tuple[int, int, int]
    dtype: np.dtype[Any]

    @property
    def n_frames(self) -> int:
        """Number of frames T."""
        return self.shape[0]

    @property
    @abstractmethod
    def description(self) -> str:
        """Where the frames come from, for messages."""

    @abstractmethod
    def _read(self, start: int, stop: int) -> np.ndarray:
        """Frames ``start:stop`` as a new ``(stop - start, Y, X)`` array of :attr:`dtype`."""

    def read(self, start: int, stop: int) -> np.ndarray:
        """Read frames ``start`` to ``stop - 1``.

        Parameters
        ----------
        start, stop : int
            Half-open frame range, ``0 <= start < stop <= T``.

        Returns
        -------
        ndarray of shape (stop - start, Y, X)
            A new array in the stored dtype.

        Raises
        ------
        ShapeError
            If the range is empty or outside ``0..T``.
        InputFileError
            If the file cannot be read (moved, truncated, corrupt).
        """
        if not 0 <= start < stop <= self.n_frames:
            raise ShapeError(
                f"{self.description}: frame range {start}:{stop} is outside 0:{self.n_frames}; "
                "ask for frames inside the video"
            )
        try:
            frames = self._read(start, stop)
        except InputFileError:
            raise
        except _READ_ERRORS as exc:
            raise InputFileError(
                f"{self.description}: cannot read frames {start}:{stop} ({exc}); check that the "
                "file is complete and unchanged"
            ) from exc
        if frames.shape != (stop - start, *self.shape[1:]):
            raise InputFileError(
                f"{self.description}: frames {start}:{stop} have shape {frames.shape}, expected "
                f"{(stop - start, *self.shape[1:])}; every frame must have the same size"
            )
        return frames

    def to_dask(self, frames_per_chunk: int = 1) -> da.Array:
        """The frames as a lazy dask array, `frames_per_chunk` frames per chunk.

        Each chunk is one task calling :meth:`read` on this (picklable) reader, so the array
        works with every dask scheduler, processes and distributed included.
        """
        import dask.array as da
        from dask.delayed import delayed

        if frames_per_chunk < 1:
            raise ShapeError(f"frames_per_chunk must be at least 1; got {frames_per_chunk}")
        blocks = []
        for start in range(0, self.n_frames, frames_per_chunk):
            stop = min(start + frames_per_chunk, self.n_frames)
            task = delayed(self.read, pure=True)(start, stop)
            blocks.append(da.from_delayed(  # type: ignore[no-untyped-call]
                task, shape=(stop - start, *self.shape[1:]), dtype=self.dtype,
                meta=np.empty((0, 0, 0), dtype=self.dtype)))
        result: da.Array = da.concatenate(blocks, axis=0)  # type: ignore[no-untyped-call]
        return result


# --------------------------------------------------------------------------------------- TIFF
@dataclass(frozen=True)
class TiffFrames(FrameSource):
    """The pages of one multi-page (Big)TIFF file, one frame per page.

    Uncompressed contiguous files (the usual camera output) are read by offset, in constant
    time per frame; other files page by page through tifffile.

    Attributes
    ----------
    path : str
        The TIFF file.
    data_offset : int or None
        Byte offset of frame 0 when the frames are stored uncompressed and back to back.
    byte_order : str
        ``"<"`` or ``">"``, the file's byte order.
    """

    path: str = ""
    data_offset: int | None = None
    byte_order: str = "<"

    @property
    def description(self) -> str:
        return self.path

    @classmethod
    def open(cls, path: str | os.PathLike[str], *, key: str = "[video] path") -> TiffFrames:
        """Check a TIFF file of 2-D frames and return its reader.

        Parameters
        ----------
        path : str or path
            The TIFF file.
        key : str
            Where the path came from (a job-file key), named in error messages.

        Raises
        ------
        InputFileError
            If the file is missing, not a TIFF, truncated, or its pages are not 2-D grayscale
            frames of one size and a real (integer or floating-point) dtype.
        """
        path = os.fspath(path)
        shape, dtype, offset, byte_order = _inspect_tiff(path, key=key)
        return cls(shape=shape, dtype=dtype, path=path, data_offset=offset,
                   byte_order=byte_order)

    def _read(self, start: int, stop: int) -> np.ndarray:
        if self.data_offset is not None:
            frame_bytes = self.shape[1] * self.shape[2] * self.dtype.itemsize
            order: Any = self.byte_order
            mapped: Any = np.memmap(self.path, dtype=self.dtype.newbyteorder(order),
                               mode="r", offset=self.data_offset + start * frame_bytes,
                               shape=(stop - start, *self.shape[1:]))
            try:
                return np.array(mapped, dtype=self.dtype)
            finally:
                del mapped
        import tifffile

        size = os.path.getsize(self.path)
        out = np.empty((stop - start, *self.shape[1:]), dtype=self.dtype)
        with tifffile.TiffFile(self.path) as tf:
            for i in range(start, stop):
                page = tf.pages[i]
                problem = tiff_page_problem(page, size)
                if problem is None and tuple(page.shape) != self.shape[1:]:
                    problem = f"it has shape {tuple(page.shape)}, page 0 {self.shape[1:]}"
                if problem is not None:
                    raise InputFileError(
                        f"{self.path}: page {i} cannot be read: {problem}; the file is damaged, "
                        "copy it again from the camera"
                    )
                out[i - start] = page.asarray()
        return out


def _inspect_tiff(path: str, *, key: str = "[video] path"
                  ) -> tuple[tuple[int, int, int], np.dtype[Any], int | None, str]:
    if not os.path.isfile(path):
        what = "is a folder, not a TIFF file" if os.path.isdir(path) else "no such file"
        raise InputFileError(f"{path}: {what}; check {key} in the job file")
    size = os.path.getsize(path)
    with capture_tifffile_log(logging.ERROR) as messages:
        n_pages, frame_shape, dtype, offset, byte_order = _read_tiff_header(path, size, key)
    if messages:
        raise InputFileError(f"{path}: damaged TIFF ({messages[0]}); copy it again")
    shape = (n_pages, frame_shape[0], frame_shape[1])
    return shape, dtype.newbyteorder("="), offset, byte_order


def _read_tiff_header(path: str, size: int, key: str
                      ) -> tuple[int, tuple[int, ...], np.dtype[Any], int | None, str]:
    import tifffile

    try:
        with tifffile.TiffFile(path) as tf:
            n_pages = len(tf.pages)
            series = tf.series
            first = tf.pages.first
            frame_shape = tuple(int(n) for n in first.shape)
            if first.dtype is None or np.dtype(first.dtype).kind not in "uif":
                raise InputFileError(
                    f"{path}: pixels are of type {first.dtype}; expected integer or "
                    "floating-point grayscale frames (save the video as uint8, uint16 or "
                    "float32)"
                )
            if len(frame_shape) != 2 or first.samplesperpixel != 1:
                raise InputFileError(
                    f"{path}: pages have shape {frame_shape}; expected 2-D grayscale frames "
                    "(one frame per page)"
                )
            dtype = np.dtype(first.dtype)
            if len(series) == 1:
                expected = int(np.prod(series[0].shape)) // int(np.prod(frame_shape))
                if series[0].ndim > 3:
                    raise InputFileError(
                        f"{path}: holds a {series[0].ndim}-D image with axes {series[0].axes}; "
                        "expected a stack of 2-D frames (one frame per page)"
                    )
            else:
                expected = len(series)
            if n_pages < expected:
                raise InputFileError(
                    f"{path}: describes {expected} frames but only {n_pages} pages can be read; "
                    "the file is truncated; copy it again from the camera"
                )
            last = tf.pages[n_pages - 1]
            end = max(o + c for o, c in zip(last.dataoffsets, last.databytecounts, strict=True))
            if end > size:
                raise InputFileError(
                    f"{path}: the last frame ends at byte {end} but the file has {size} bytes; "
                    "the file is truncated; copy it again from the camera"
                )
            for index in sorted({0, n_pages - 1}):
                problem = tiff_page_problem(tf.pages[index], size)
                if problem is not None:
                    raise InputFileError(
                        f"{path}: page {index} cannot be read: {problem}; the file is damaged, "
                        "copy it again"
                    )
            offset = None
            if len(series) == 1 and series[0].dataoffset is not None and n_pages == expected:
                offset = int(series[0].dataoffset)
            for page_index in (1, n_pages - 1):
                if page_index < n_pages:
                    page = tf.pages[page_index]
                    if tuple(page.shape) != frame_shape or np.dtype(page.dtype) != dtype:
                        raise InputFileError(
                            f"{path}: page {page_index} has shape {tuple(page.shape)} and dtype "
                            f"{page.dtype}, page 0 {frame_shape} and {dtype}; every frame must "
                            "have the same size and type"
                        )
            byte_order = tf.byteorder
    except InputFileError:
        raise
    except _TIFF_ERRORS as exc:
        raise InputFileError(
            f"{path}: not a readable TIFF file ({exc}); check {key}"
        ) from exc
    return n_pages, frame_shape, dtype, offset, byte_order


def natural_sort_key(name: str) -> list[Any]:
    """Sort key that orders embedded numbers by value: ``frame2`` before ``frame10``."""
    return [(0, int(part), part) if part.isdigit() else (1, 0, part.lower())
            for part in re.split(r"(\d+)", name) if part]


@dataclass(frozen=True)
class TiffGlobFrames(FrameSource):
    """A sequence of single-frame TIFF files, in natural order of their names.

    Attributes
    ----------
    paths : tuple of str
        One file per frame, sorted so that ``img_2.tif`` comes before ``img_10.tif``.
    pattern : str
        The glob pattern they came from.
    """

    paths: tuple[str, ...] = ()
    pattern: str = ""

    @property
    def description(self) -> str:
        return self.pattern

    @classmethod
    def open(cls, pattern: str | os.PathLike[str]) -> TiffGlobFrames:
        """Find the files matching `pattern` and check the first one.

        Raises
        ------
        InputFileError
            If nothing matches or the first file is not a single 2-D frame.
        """
        pattern = os.fspath(pattern)
        paths = sorted(glob.glob(pattern), key=lambda p: natural_sort_key(os.path.basename(p)))
        paths = [p for p in paths if os.path.isfile(p)]
        if not paths:
            raise InputFileError(f"{pattern}: no file matches this pattern; check [video] path")
        shape, dtype, _, _ = _inspect_tiff(paths[0])
        if shape[0] != 1:
            raise InputFileError(
                f"{paths[0]}: holds {shape[0]} frames; a glob of TIFFs needs one frame per file "
                "(give a multi-page file as a path without wildcards)"
            )
        return cls(shape=(len(paths), shape[1], shape[2]), dtype=dtype, paths=tuple(paths),
                   pattern=pattern)

    def _read(self, start: int, stop: int) -> np.ndarray:
        import tifffile

        out = np.empty((stop - start, *self.shape[1:]), dtype=self.dtype)
        for i in range(start, stop):
            try:
                frame = tifffile.imread(self.paths[i])
            except _TIFF_ERRORS as exc:
                raise InputFileError(
                    f"{self.paths[i]}: cannot read frame {i} ({exc}); check the file"
                ) from exc
            if frame.shape != self.shape[1:]:
                raise InputFileError(
                    f"{self.paths[i]}: frame {i} has shape {frame.shape}, the first file "
                    f"{self.shape[1:]}; every file must hold one frame of the same size"
                )
            out[i - start] = frame
        return out


# --------------------------------------------------------------------------------------- zarr
@dataclass(frozen=True)
class ZarrFrames(FrameSource):
    """A 3-D ``(T, Y, X)`` zarr array (v2 or v3), read chunk-wise.

    Attributes
    ----------
    path : str
        The zarr store (a directory).
    component : str
        Path of the array inside the store (``""`` when the store is the array).
    """

    path: str = ""
    component: str = ""

    @property
    def description(self) -> str:
        return f"{self.path}/{self.component}" if self.component else self.path

    @classmethod
    def open(cls, path: str | os.PathLike[str], component: str = "") -> ZarrFrames:
        """Check a zarr array of frames and return its reader.

        Raises
        ------
        InputFileError
            If `path` is not a zarr store or `component` is not a 3-D array in it.
        """
        path = os.fspath(path)
        array = _open_zarr_array(path, component)
        if array.ndim != 3:
            raise InputFileError(
                f"{path}: array {component or '/'} has shape {array.shape}; expected (T, Y, X)"
            )
        return cls(shape=tuple(int(n) for n in array.shape),  # type: ignore[arg-type]
                   dtype=np.dtype(array.dtype), path=path, component=component)

    def _read(self, start: int, stop: int) -> np.ndarray:
        return np.array(_open_zarr_array(self.path, self.component)[start:stop],
                        dtype=self.dtype)


def _open_zarr_array(path: str, component: str) -> Any:
    import zarr

    if not os.path.isdir(path):
        raise InputFileError(f"{path}: no such zarr store; check [video] path")
    if not any(os.path.isfile(os.path.join(path, name))
               for name in ("zarr.json", ".zarray", ".zgroup")):
        raise InputFileError(
            f"{path}: a folder but not a zarr store (no zarr.json); set [video] path to a TIFF "
            "file, a glob pattern of TIFFs or a zarr store"
        )
    try:
        node = zarr.open(path, mode="r", path=component or None)
    except (FileNotFoundError, KeyError, ValueError, zarr.errors.NodeNotFoundError) as exc:
        raise InputFileError(
            f"{path}: no zarr array at '{component}' ({exc}); set [video] component to the "
            "array's path inside the store"
        ) from exc
    if not isinstance(node, zarr.Array):
        names = sorted(name for name, _ in node.arrays())
        raise InputFileError(
            f"{path}: '{component or '/'}' is a zarr group; set [video] component to one of its "
            f"arrays {names}"
        )
    return node


# ----------------------------------------------------------------------------------- dispatch
def open_frames(path: str | os.PathLike[str], *, component: str = "") -> FrameSource:
    """Open raw video lazily: a TIFF file, a glob pattern of TIFFs, or a zarr array.

    Parameters
    ----------
    path : str or path
        ``*.tif``/``*.tiff`` file (multi-page, BigTIFF allowed), a glob pattern
        (``frames/*.tif``, sorted in natural order) or a zarr store directory.
    component : str, optional
        For zarr: the array's path inside the store.

    Returns
    -------
    FrameSource
        A picklable reader; nothing but the file headers has been read.

    Raises
    ------
    InputFileError
        If the input is missing, unreadable, truncated or not a stack of 2-D frames.
    """
    text = os.fspath(path)
    if _GLOB_CHARACTERS & set(Path(text).name) or _GLOB_CHARACTERS & set(str(Path(text).parent)):
        return TiffGlobFrames.open(text)
    if os.path.isdir(text):
        return ZarrFrames.open(text, component)
    if component:
        raise InputFileError(f"{text}: [video] component is only for zarr stores; remove it")
    return TiffFrames.open(text)


def read_image(path: str | os.PathLike[str], *, key: str = "the calibration image path"
               ) -> np.ndarray:
    """Read a calibration image (dark or flat frame) as float32 ``(Y, X)``.

    A multi-page TIFF is averaged over its pages (a stack of dark frames becomes their mean).

    Parameters
    ----------
    path : str or path
        The TIFF file.
    key : str
        Where the path came from (e.g. ``"[video] dark"``), named in error messages.

    Raises
    ------
    InputFileError
        If the file is missing or not a TIFF of 2-D frames.
    """
    source = TiffFrames.open(path, key=key)
    total = np.zeros(source.shape[1:], dtype=np.float64)
    step = 64
    for start in range(0, source.n_frames, step):
        total += source.read(start, min(start + step, source.n_frames)).sum(axis=0,
                                                                           dtype=np.float64)
    return (total / source.n_frames).astype(np.float32)
