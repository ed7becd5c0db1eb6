"""Lazy readers of raw camera video: a multi-page (Big)TIFF, TIFF parts (a glob of TIFF files
or an OME-TIFF series over several files), a zarr array (HDF5: :mod:`volrecon.io.hdf5`).

Every reader is a small frozen object that holds paths and the frame shape and dtype only. It
opens its file inside :meth:`FrameSource.read`, so a reader pickles and each dask task (in a
thread, a process or on a cluster node) reads just its own frames. Opening a reader checks the
file once: shape, dtype and, for TIFF, that the file is not truncated.
"""

from __future__ import annotations

import bisect
import glob
import logging
import os
import re
import struct
from abc import ABC, abstractmethod
from dataclasses import dataclass
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
        return _read_pages(self.path, start, stop, self.shape[1:], self.dtype)


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
            if len(series) == 1 and getattr(series[0], "is_multifile", False):
                raise InputFileError(
                    f"{path}: is one file of an OME-TIFF series over several files; set {key} "
                    "to this one file (no wildcards): the series is read across its files"
                )
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
    """Frames spread over several TIFF files, read part by part.

    Two layouts give such a video: a glob pattern of TIFF files, each one frame or a
    multi-page part of a long recording (in natural order of their paths, so
    ``part_2.tif`` comes before ``part_10.tif``), and an OME-TIFF series whose OME-XML places
    its planes in several files. A read opens only the files that hold the frames asked for.

    Attributes
    ----------
    paths : tuple of str
        The file of each part (a run of consecutive frames in one file).
    part_stops : tuple of int
        The frame just after each part: part ``i`` holds frames
        ``part_stops[i - 1]:part_stops[i]`` (from 0 for the first part).
    first_pages : tuple of int
        For an OME-TIFF series, the page (IFD) of each part's first frame in its file; empty
        for a glob, whose parts are whole files.
    parts : tuple of TiffFrames
        For a glob of multi-page parts, each part's reader (its header read at open, so
        uncompressed parts are read by offset); empty for single frames, each file checked
        as it is read.
    pattern : str
        The glob pattern or the OME-TIFF file given, for messages.
    """

    paths: tuple[str, ...] = ()
    part_stops: tuple[int, ...] = ()
    first_pages: tuple[int, ...] = ()
    parts: tuple[TiffFrames, ...] = ()
    pattern: str = ""

    @property
    def description(self) -> str:
        return self.pattern

    @classmethod
    def open(cls, pattern: str | os.PathLike[str], *, key: str = "[video] path"
             ) -> TiffGlobFrames:
        """Find the TIFF files matching `pattern` and read the headers needed.

        When the first and the last file each hold one frame, every file is taken to hold
        one (checked as it is read, so a glob of 10^5 single frames opens fast); otherwise
        every file's header is read now to count its frames.

        Raises
        ------
        InputFileError
            If nothing matches, a file is damaged or truncated, holds frames of another size
            or type than the first file, or is one file of an OME-TIFF series.
        """
        pattern = os.fspath(pattern)
        paths = sorted((p for p in glob.glob(pattern) if os.path.isfile(p)),
                       key=natural_sort_key)
        if not paths:
            raise InputFileError(f"{pattern}: no file matches this pattern; check {key}")
        first = _inspect_tiff(paths[0], key=key)
        last = _inspect_tiff(paths[-1], key=key) if len(paths) > 1 else first
        _check_same_frames(paths[0], first, paths[-1], last)
        parts: list[TiffFrames] = []
        if first[0][0] == 1 and last[0][0] == 1:
            counts = [1] * len(paths)
        else:
            known = {paths[0]: first, paths[-1]: last}
            for path in paths:
                part = known[path] if path in known else _inspect_tiff(path, key=key)
                _check_same_frames(paths[0], first, path, part)
                parts.append(TiffFrames(shape=part[0], dtype=part[1], path=path,
                                        data_offset=part[2], byte_order=part[3]))
            counts = [part.n_frames for part in parts]
        stops = tuple(int(n) for n in np.cumsum(counts))
        return cls(shape=(stops[-1], first[0][1], first[0][2]), dtype=first[1],
                   paths=tuple(paths), part_stops=stops, parts=tuple(parts), pattern=pattern)

    def _read(self, start: int, stop: int) -> np.ndarray:
        out = np.empty((stop - start, *self.shape[1:]), dtype=self.dtype)
        part = bisect.bisect_right(self.part_stops, start)
        index = start
        while index < stop:
            begin = self.part_stops[part - 1] if part else 0
            end = min(stop, self.part_stops[part])
            out[index - start:end - start] = self._read_part(part, index - begin, end - begin)
            index, part = end, part + 1
        return out

    def _read_part(self, part: int, start: int, stop: int) -> np.ndarray:
        path = self.paths[part]
        if self.first_pages:
            first = self.first_pages[part]
            return _read_pages(path, first + start, first + stop, self.shape[1:], self.dtype)
        if self.parts:
            return self.parts[part].read(start, stop)
        source = TiffFrames.open(path)
        if source.shape[1:] != self.shape[1:] or source.dtype != self.dtype:
            raise InputFileError(
                f"{path}: holds frames of {source.shape[1:]} {source.dtype}, the first file of "
                f"{self.pattern} {self.shape[1:]} {self.dtype}; every file must hold frames of "
                "one size and type, move the odd file out of the pattern"
            )
        if source.n_frames != 1:
            raise InputFileError(
                f"{path}: holds {source.n_frames} frames, the first and last files of "
                f"{self.pattern} one each; give every file one frame, or match the parts of a "
                "recording with a pattern of their own"
            )
        return source.read(start, stop)


_Inspected = tuple[tuple[int, int, int], np.dtype[Any], int | None, str]


def _check_same_frames(first_path: str, first: _Inspected, path: str, info: _Inspected
                       ) -> None:
    if info[0][1:] != first[0][1:] or info[1] != first[1]:
        raise InputFileError(
            f"{path}: holds frames of {info[0][1:]} {info[1]}, but {first_path} "
            f"{first[0][1:]} {first[1]}; every file of the glob must hold frames of one size "
            "and type, move the odd file out of the pattern"
        )


def _read_pages(path: str, start: int, stop: int, frame_shape: tuple[int, ...],
                dtype: np.dtype[Any]) -> np.ndarray:
    """Pages ``start:stop`` of one TIFF file, each checked against the file before reading."""
    import tifffile

    size = os.path.getsize(path)
    out = np.empty((stop - start, *frame_shape), dtype=dtype)
    with tifffile.TiffFile(path) as tf:
        for i in range(start, stop):
            page = tf.pages[i]
            problem = tiff_page_problem(page, size)
            if problem is None and (tuple(page.shape) != frame_shape
                                    or np.dtype(page.dtype).newbyteorder("=") != dtype):
                problem = (f"it holds {tuple(page.shape)} {page.dtype}, the video "
                           f"{frame_shape} {dtype}")
            if problem is not None:
                raise InputFileError(
                    f"{path}: page {i} cannot be read: {problem}; the file is damaged, copy "
                    "it again from the camera"
                )
            out[i - start] = page.asarray()
    return out


def _open_ome_series(path: str, key: str) -> TiffGlobFrames | None:
    """The reader of an OME-TIFF series spread over several files; None for any other file.

    tifffile's OME support follows the OME-XML's references to the other files (they must
    sit in the same folder); their headers are read here, their pixels only by the tasks.
    """
    import tifffile

    try:
        with capture_tifffile_log(logging.WARNING) as messages, tifffile.TiffFile(path) as tf:
            if not tf.is_ome:
                return None
            binary_only = re.search(r'<BinaryOnly[^>]*MetadataFile="([^"]+)"',
                                    tf.ome_metadata or "")
            if binary_only:
                raise InputFileError(
                    f"{path}: holds only pixels of an OME-TIFF series whose OME-XML is in "
                    f"{binary_only.group(1)}; set {key} to that file"
                )
            series = tf.series[0] if tf.series else None
            missing = [m for m in messages if "failed to read" in m or "missing" in m]
            if missing:
                raise InputFileError(
                    f"{path}: the OME-TIFF series lacks planes ({missing[0]}); put every file "
                    "the OME-XML names next to this one"
                )
            if series is None or not series.is_multifile:
                return None
            return _ome_parts(path, series, key)
    except InputFileError:
        raise
    except _TIFF_ERRORS:
        return None  # not a readable OME-TIFF series: the TIFF reader says what is wrong


def _ome_parts(path: str, series: Any, key: str) -> TiffGlobFrames:
    axes, shape = str(series.axes), tuple(int(n) for n in series.shape)
    if len(shape) not in (2, 3) or "S" in axes:
        raise InputFileError(
            f"{path}: holds an OME-TIFF series of shape {shape} with axes {axes}; expected "
            f"(T, Y, X) grayscale frames; check {key}"
        )
    dtype = np.dtype(series.dtype)
    if dtype.kind not in "uif":
        raise InputFileError(f"{path}: pixels are of type {dtype}; expected integer or "
                             "floating-point grayscale frames")
    paths: list[str] = []
    firsts: list[int] = []
    counts: list[int] = []
    for frame, page in enumerate(series.pages):
        if page is None:
            raise InputFileError(f"{path}: plane {frame} of the OME-TIFF series is in no "
                                 "readable file; put every file of the series next to it")
        file, index = str(page.parent.filehandle.path), int(page.index)
        if paths and paths[-1] == file and firsts[-1] + counts[-1] == index:
            counts[-1] += 1
        else:
            paths.append(file)
            firsts.append(index)
            counts.append(1)
    stops = tuple(int(n) for n in np.cumsum(counts))
    return TiffGlobFrames(shape=(stops[-1], shape[-2], shape[-1]), dtype=dtype.newbyteorder("="),
                          paths=tuple(paths), part_stops=stops, first_pages=tuple(firsts),
                          pattern=path)


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
            "file, a glob pattern of TIFFs, an HDF5 file or a zarr store"
        )
    try:
        node = zarr.open(path, mode="r", path=component or None)
    except (FileNotFoundError, KeyError, ValueError, zarr.errors.NodeNotFoundError) as exc:
        raise InputFileError(
            f"{path}: no zarr array at '{component}' ({exc}); set [video] dataset to the "
            "array's path inside the store"
        ) from exc
    if not isinstance(node, zarr.Array):
        names = sorted(name for name, _ in node.arrays())
        raise InputFileError(
            f"{path}: '{component or '/'}' is a zarr group; set [video] dataset to one of its "
            f"arrays {names}"
        )
    return node


# ----------------------------------------------------------------------------------- dispatch
def open_frames(path: str | os.PathLike[str], *, component: str = "",
                key: str = "[video] path") -> FrameSource:
    """Open raw video lazily, the format found from the path and the file's content.

    Parameters
    ----------
    path : str or path
        A TIFF file (multi-page, BigTIFF, or one file of an OME-TIFF series over several
        files: the whole series is read), a glob pattern of TIFF files (single frames or
        multi-page parts, in natural order: ``part_2`` before ``part_10``), an HDF5 file
        (HDF5 signature, or a name ending ``.h5``/``.hdf5``/``.hdf``/``.he5``/``.nxs``) or a
        zarr store directory.
    component : str, optional
        ``[video] dataset``: the array's path inside a zarr store or an HDF5 file. Optional
        for HDF5 when the file holds exactly one 3-D dataset.
    key : str
        Where `path` came from, named in messages.

    Returns
    -------
    FrameSource
        A picklable reader; nothing but the file headers has been read.

    Raises
    ------
    InputFileError
        If the input is missing, unreadable, truncated or not a stack of 2-D frames, or a
        dataset is given for a TIFF input.
    """
    from volrecon.io.hdf5 import HDF5_SUFFIXES, Hdf5Frames, is_hdf5

    text = os.fspath(path)
    is_pattern = _GLOB_CHARACTERS & set(text)
    if os.path.isdir(text) and not is_pattern:
        return ZarrFrames.open(text, component)
    if os.path.isfile(text) and (is_hdf5(text) or text.lower().endswith(HDF5_SUFFIXES)):
        return Hdf5Frames.open(text, component)
    if component:
        raise InputFileError(f"{text}: [video] dataset is only for zarr stores and HDF5 "
                             "files, this is a TIFF input; remove it")
    if is_pattern:
        return TiffGlobFrames.open(text, key=key)
    series = _open_ome_series(text, key) if os.path.isfile(text) else None
    return series if series is not None else TiffFrames.open(text, key=key)


def read_image(path: str | os.PathLike[str], *, key: str = "the calibration image path"
               ) -> np.ndarray:
    """Read a calibration image (dark or flat frame) as float32 ``(Y, X)``.

    A stack of frames is averaged (a stack of dark frames becomes their mean).

    Parameters
    ----------
    path : str or path
        Any input :func:`open_frames` reads (an HDF5 file's only 3-D or 2-D dataset).
    key : str
        Where the path came from (e.g. ``"[video] dark"``), named in error messages.

    Raises
    ------
    InputFileError
        If the file is missing or not a stack of 2-D frames.
    """
    source = open_frames(path, key=key)
    total = np.zeros(source.shape[1:], dtype=np.float64)
    step = 64
    for start in range(0, source.n_frames, step):
        total += source.read(start, min(start + step, source.n_frames)).sum(axis=0,
                                                                           dtype=np.float64)
    return (total / source.n_frames).astype(np.float32)
