"""Small helpers shared by the dock widgets (magicgui input values)."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

__all__ = ["chosen_path"]


def chosen_path(widget: Any) -> Path | None:
    """The path in a magicgui ``FileEdit``, or None when nothing is chosen."""
    value = widget.value
    if not isinstance(value, str | os.PathLike):
        return None
    text = os.fspath(value).strip()
    return None if text in ("", ".") else Path(text)
