"""Parsing the text forms of calibration options (as typed on the command line)."""

from __future__ import annotations

import re

from volrecon.errors import ConfigError

__all__ = ["parse_crop", "parse_rank"]

_CROP = re.compile(r"^\s*(\d+)\s*:\s*(\d+)\s*,\s*(\d+)\s*:\s*(\d+)\s*$")


def parse_crop(text: str) -> tuple[int, int, int, int]:
    """``"Y0:Y1,X0:X1"`` → ``(y0, y1, x0, x1)`` (pixel rows y0..y1-1, columns x0..x1-1).

    Raises
    ------
    ConfigError
        If the text is not of that form or a range is empty.

    Examples
    --------
    >>> parse_crop("10:110,20:220")
    (10, 110, 20, 220)
    """
    match = _CROP.match(text)
    if not match:
        raise ConfigError(f"--crop {text!r} is not of the form Y0:Y1,X0:X1 (e.g. 0:512,64:576)")
    y0, y1, x0, x1 = (int(g) for g in match.groups())
    if y1 <= y0 or x1 <= x0:
        raise ConfigError(f"--crop {text!r} selects no pixels; use Y0 < Y1 and X0 < X1")
    return y0, y1, x0, x1


def parse_rank(text: str | None) -> int | str | None:
    """``None`` → None (full rank), ``"auto"`` → ``"auto"``, ``"N"`` → N (positive).

    Raises
    ------
    ConfigError
        If the text is neither "auto" nor a positive integer.

    Examples
    --------
    >>> parse_rank("auto"), parse_rank("4"), parse_rank(None)
    ('auto', 4, None)
    """
    if text is None:
        return None
    cleaned = text.strip().lower()
    if cleaned == "auto":
        return "auto"
    if cleaned.isdigit() and int(cleaned) >= 1:
        return int(cleaned)
    raise ConfigError(f"--rank {text!r} is neither a positive integer nor 'auto'; use e.g. "
                      "--rank 8 or --rank auto")
