"""Reading calibration inputs: bead-scan and dark TIFFs, field-position CSV files."""

from __future__ import annotations

import csv
import logging
import os
import struct
from pathlib import Path

import numpy as np

from volrecon.errors import InputFileError, ShapeError
from volrecon.io.frames import tiff_page_problem

__all__ = ["read_positions", "read_tiff_stack"]


class _Collect(logging.Handler):
    """Keeps the messages tifffile logs (it logs, rather than raises, on broken page chains)."""

    def __init__(self) -> None:
        super().__init__(level=logging.WARNING)
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


def read_tiff_stack(path: str | os.PathLike[str], *, what: str = "bead scan") -> np.ndarray:
    """Read every page of a grayscale TIFF into one array, refusing damaged files.

    Parameters
    ----------
    path : path-like
        A (multi-page) TIFF; the first series is read, e.g. (Z, Y, X) or (K, Z, Y, X).
    what : str
        What the file is, for error messages ("bead scan", "dark frame").

    Returns
    -------
    ndarray
        The stored dtype (any integer or float type), shape as stored.

    Raises
    ------
    InputFileError
        If the file is missing, not a TIFF, truncated or corrupt, colour, or of a
        non-real dtype.
    """
    import tifffile

    p = Path(path)
    if not p.is_file():
        raise InputFileError(f"{p}: no such file; check the path of the {what}")
    collect = _Collect()
    logger = logging.getLogger("tifffile")
    # For the duration of the read, tifffile's warnings come here only: whatever level a
    # caller set (the CLI silences tifffile) must not hide a broken page chain.
    level, propagate = logger.level, logger.propagate
    logger.setLevel(logging.WARNING)
    logger.propagate = False
    logger.addHandler(collect)
    try:
        with tifffile.TiffFile(p) as tf:
            series = tf.series[0]
            axes = series.axes
            size = p.stat().st_size
            for index, page in enumerate(series.pages):
                problem = None if page is None else tiff_page_problem(page, size)
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
    finally:
        logger.removeHandler(collect)
        logger.setLevel(level)
        logger.propagate = propagate
    broken = [m for m in collect.messages if "invalid" in m or "corrupt" in m]
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


def read_positions(path: str | os.PathLike[str], n_positions: int) -> np.ndarray:
    """Read field positions ``(y_px, x_px)`` from a CSV file, one row per position.

    The file has two columns, y then x in pixels of the raw bead-scan image; a header row
    is optional, and if present it may name the columns ``y_px`` and ``x_px`` in either
    order.

    Parameters
    ----------
    path : path-like
    n_positions : int
        Number of field positions K in the bead scan; the file must have K rows.

    Returns
    -------
    ndarray of shape (K, 2), float64

    Raises
    ------
    InputFileError
        If the file is missing or a value is not a number.
    ShapeError
        If the file does not have K rows of 2 values.
    """
    p = Path(path)
    if not p.is_file():
        raise InputFileError(f"{p}: no such file; check the --positions path")
    try:
        with p.open(newline="") as handle:
            rows = [row for row in csv.reader(handle) if any(cell.strip() for cell in row)]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputFileError(f"{p}: cannot read the positions CSV ({exc}); write it as plain "
                             "text with columns y_px,x_px") from exc
    columns = (0, 1)
    if rows and not _numeric(rows[0][0]):
        header = [cell.strip().lower() for cell in rows.pop(0)]
        if "y_px" in header and "x_px" in header:
            columns = (header.index("y_px"), header.index("x_px"))
    values = []
    for number, row in enumerate(rows, start=1):
        cells = [c.strip() for c in row]
        if len(cells) != 2 and columns == (0, 1):
            raise ShapeError(f"{p}: data row {number} has {len(cells)} values; each row must "
                             "be y_px,x_px")
        try:
            values.append([float(cells[columns[0]]), float(cells[columns[1]])])
        except (ValueError, IndexError) as exc:
            raise InputFileError(f"{p}: data row {number} ({','.join(cells)}) is not two "
                                 "numbers y_px,x_px; fix that row") from exc
    positions = np.array(values, dtype=np.float64).reshape(-1, 2)
    if positions.shape[0] != n_positions:
        raise ShapeError(f"{p}: has {positions.shape[0]} positions but the bead scan has "
                         f"{n_positions} field positions (first axis of its (K, Z, Y, X) "
                         "shape); give one y_px,x_px row per position")
    if not np.isfinite(positions).all():
        raise InputFileError(f"{p}: contains NaN or Inf; give finite pixel coordinates")
    return positions


def _numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
