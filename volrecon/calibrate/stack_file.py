"""Reading field-position CSV files (bead-scan stacks, TIFF, TIFF parts, OME-TIFF series or
HDF5: :func:`volrecon.io.read_tiff_stack`)."""

from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np

from volrecon.errors import InputFileError, ShapeError

__all__ = ["read_positions"]


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
