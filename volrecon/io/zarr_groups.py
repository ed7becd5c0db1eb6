"""Read a zarr v3 group's attributes through zarr itself."""

from __future__ import annotations

import os
import warnings
from pathlib import Path
from typing import Any

__all__ = ["group_attributes"]


def group_attributes(path: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The attributes of the zarr v3 group at `path`, or None if `path` is not one.

    Never raises and never warns: a missing folder, a zarr v2 store, an array, or unreadable
    metadata all give None.
    """
    source = Path(path)
    if not (source / "zarr.json").is_file():
        return None
    try:
        import zarr

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            group = zarr.open_group(zarr.storage.LocalStore(source, read_only=True),
                                    mode="r", zarr_format=3)
            attributes = group.attrs.asdict()
    except Exception:
        return None
    return dict(attributes) if isinstance(attributes, dict) else None
