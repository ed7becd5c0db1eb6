"""The npe2 reader: volrecon output stores and PSF model stores, opened lazily."""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from typing import Any

from volrecon.napari.stores import LayerData, store_kind, store_layers

__all__ = ["get_reader", "read_stores"]

PathOrPaths = str | os.PathLike[str] | Sequence[str | os.PathLike[str]]


def _paths(path: Any) -> list[str]:
    if isinstance(path, str | os.PathLike):
        return [os.fspath(path)]
    if isinstance(path, Sequence):
        return [os.fspath(p) for p in path if isinstance(p, str | os.PathLike)]
    return []


def get_reader(path: PathOrPaths) -> Callable[[PathOrPaths], list[LayerData]] | None:
    """The reader of `path` if every path is a volrecon store, else None.

    Checks only each folder's ``zarr.json``; never raises or warns, so napari can offer the
    path to other plugins when it is not ours.
    """
    paths = _paths(path)
    if not paths or any(store_kind(p.rstrip("/\\")) is None for p in paths):
        return None
    return read_stores


def read_stores(path: PathOrPaths) -> list[LayerData]:
    """Layer data of each store in `path` (see :func:`volrecon.napari.stores.store_layers`)."""
    layers: list[LayerData] = []
    for p in _paths(path):
        layers.extend(store_layers(p.rstrip("/\\")))
    return layers
