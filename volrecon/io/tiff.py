"""Reading whole stacks (bead scans, dark frames, reference z-stacks: TIFF, TIFF parts, OME-TIFF
series, HDF5) and the checks every TIFF reader of volrecon shares: page tags against the file,
tifffile's log."""

from __future__ import annotations

import contextlib
import logging
import os
import struct
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.backend import physical_memory_bytes
from volrecon.errors import InputFileError

__all__ = ["capture_tifffile_log", "read_tiff_stack", "tiff_page_problem"]


class _Collect(logging.Handler):
    """Keeps the messages tifffile logs (it logs, rather than raises, on broken page chains)."""

    def __init__(self, level: int, messages: list[str]) -> None:
        super().__init__(level=level)
        self.messages = messages

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


@contextlib.contextmanager
def capture_tifffile_log(level: int) -> Iterator[list[str]]:
    """Collect tifffile's log messages of `level` and above while the block runs.

    For the duration of the block they come here only: whatever level a caller set (the CLI
    silences tifffile) must not hide a broken page chain, which tifffile logs instead of
    raising. The logger's level and propagation are restored afterwards.
    """
    messages: list[str] = []
    handler = _Collect(level, messages)
    logger = logging.getLogger("tifffile")
    saved_level, propagate = logger.level, logger.propagate
    logger.setLevel(level)
    logger.propagate = False
    logger.addHandler(handler)
    try:
        yield messages
    finally:
        logger.removeHandler(handler)
        logger.setLevel(saved_level)
        logger.propagate = propagate


def tiff_page_problem(page: Any, file_size: int) -> str | None:
    """Why a TIFF page's pixels cannot be read as its tags declare, or None if they can.

    Checked on the tags alone, before any pixel is read: a damaged header can declare any
    image size, and the TIFF reader allocates what is declared before it finds the data
    missing.

    Parameters
    ----------
    page : tifffile.TiffPage
        The page.
    file_size : int
        Size of the file in bytes.

    Returns
    -------
    str or None
        The problem, in words, for an error message.
    """
    offsets, counts = tuple(page.dataoffsets), tuple(page.databytecounts)
    if not offsets or len(offsets) != len(counts):
        return "its tags point at no image data"
    end = max(o + c for o, c in zip(offsets, counts, strict=True))
    if end > file_size:
        return f"its image data end at byte {end} but the file has {file_size} bytes"
    declared = int(np.prod(page.shape, dtype=np.int64)) * np.dtype(page.dtype).itemsize
    if int(getattr(page, "compression", 0)) == 1 and sum(counts) < declared:  # uncompressed
        return f"its tags declare {declared} bytes of pixels but it holds {sum(counts)}"
    if declared > physical_memory_bytes():
        return f"its tags declare {declared} bytes of pixels, more than this machine's memory"
    return None


def read_tiff_stack(path: str | os.PathLike[str], *, what: str = "bead scan",
                    key: str | None = None, dataset: str = "") -> np.ndarray:
    """Read a whole grayscale stack into one array, refusing damaged files.

    Besides one TIFF file this reads an OME-TIFF series over several files (give the file
    with the OME-XML), a glob pattern of TIFF parts (natural order of the paths, stacked along
    the first axis) and an HDF5 dataset (HDF5 signature or an ``.h5``-like name).

    Parameters
    ----------
    path : path-like
        A (multi-page) TIFF; the first series is read, e.g. (Z, Y, X) or (K, Z, Y, X).
        Or a glob pattern of such files, or an HDF5 file.
    what : str
        What the file is, for error messages ("bead scan", "dark frame").
    key : str, optional
        Where the path came from (an option such as ``"--reference"``), named when the file
        is missing.
    dataset : str, optional
        For HDF5: the dataset's path. Default: the file's only dataset of 4, 3 or 2 axes.

    Returns
    -------
    ndarray
        The stored dtype (any integer or float type), shape as stored.

    Raises
    ------
    InputFileError
        If the file is missing, not a TIFF or HDF5 file, truncated or corrupt, colour, or of
        a non-real dtype; or the parts of a glob differ in shape or type.
    """
    from volrecon.io.hdf5 import HDF5_SUFFIXES, is_hdf5, read_hdf5_array

    text = os.fspath(path)
    where = key or f"the path of the {what}"
    if set("*?[") & set(text):
        return _read_stack_parts(text, what, where)
    p = Path(path)
    if not p.is_file():
        raise InputFileError(f"{p}: no such file; check {where}")
    if is_hdf5(text) or text.lower().endswith(HDF5_SUFFIXES):
        return read_hdf5_array(p, dataset, what=what, key=where)
    with capture_tifffile_log(logging.WARNING) as messages:
        axes, data = _read_series(p, what)
    missing = [m for m in messages if "failed to read" in m or "missing" in m]
    if missing:
        raise InputFileError(f"{p}: the {what} is an OME-TIFF series that lacks planes "
                             f"({missing[0]}); put every file the OME-XML names next to it")
    broken = [m for m in messages if "invalid" in m or "corrupt" in m]
    if broken:
        raise InputFileError(f"{p}: the {what} TIFF is truncated or corrupt ({broken[0]}); "
                             "export it again")
    if axes.endswith("S") and data.shape[-1] in (3, 4):
        raise InputFileError(f"{p}: the {what} is a colour (RGB) TIFF of shape {data.shape}; "
                             "save it as a grayscale stack")
    if not (np.issubdtype(data.dtype, np.integer) or np.issubdtype(data.dtype, np.floating)):
        raise InputFileError(f"{p}: the {what} has pixel type {data.dtype}; use an integer or "
                             "floating-point grayscale TIFF")
    return data


def _read_stack_parts(pattern: str, what: str, where: str) -> np.ndarray:
    """The TIFF files matching `pattern`, in natural order, stacked along their first axis."""
    import glob

    from volrecon.io.frames import natural_sort_key

    paths = sorted((p for p in glob.glob(pattern) if os.path.isfile(p)), key=natural_sort_key)
    if not paths:
        raise InputFileError(f"{pattern}: no file matches this pattern; check {where}")
    parts: list[np.ndarray] = []
    for path in paths:
        part = read_tiff_stack(path, what=what, key=where)
        part = part[np.newaxis] if part.ndim == 2 else part
        if parts and (part.shape[1:] != parts[0].shape[1:] or part.dtype != parts[0].dtype):
            raise InputFileError(
                f"{path}: this part of the {what} has shape {part.shape} {part.dtype}, "
                f"{paths[0]} {parts[0].shape} {parts[0].dtype}; every part must hold planes "
                "of one size and type, move the odd file out of the pattern"
            )
        parts.append(part)
    return np.concatenate(parts, axis=0)


def _read_series(p: Path, what: str) -> tuple[str, np.ndarray]:
    import tifffile

    try:
        with tifffile.TiffFile(p) as tf:
            series = tf.series[0]
            axes = series.axes
            for index, page in enumerate(series.pages):
                if page is None:
                    raise InputFileError(f"{p}: plane {index} of the {what} is in no readable "
                                         "file of its OME-TIFF series; put every file of the "
                                         "series next to this one")
                problem = tiff_page_problem(page, os.path.getsize(page.parent.filehandle.path))
                if problem is not None:
                    raise InputFileError(f"{p}: page {index} of the {what} cannot be read: "
                                         f"{problem}; the file is damaged, export it again")
            data = series.asarray()
    except InputFileError:
        raise
    except (ValueError, struct.error, OSError, RuntimeError, IndexError, KeyError, TypeError,
            ArithmeticError, AssertionError) as exc:
        # tifffile raises TiffFileError (a ValueError), struct.error on a cut header,
        # ValueError on cut image data, codec errors (RuntimeError) on bad compression, and
        # KeyError, TypeError, ZeroDivisionError or a failed internal assert on nonsense tags.
        raise InputFileError(f"{p}: cannot read the {what} as TIFF ({exc}); the file is "
                             "damaged or not a TIFF, export it again") from exc
    return axes, data
