"""Read a zarr v3 group's attributes through zarr itself."""

from __future__ import annotations

import os
import warnings
from pathlib import Path
from typing import Any

from volrecon.errors import InputFileError

__all__ = ["group_attributes"]

#: What zarr (3.1) and json raise while opening a group whose ``zarr.json`` exists but is
#: damaged. Found by experiment: not JSON, truncated or not UTF-8 (``JSONDecodeError`` and
#: ``UnicodeDecodeError``, both ``ValueError``); a JSON value that is not an object
#: (``TypeError``, ``AttributeError``); unknown keys or attributes that are not a table
#: (``TypeError``); a bad ``zarr_format`` (``ValueError``); a bad ``node_type`` (zarr's
#: ``GroupNotFoundError``, a ``ValueError`` and ``OSError``); nesting deeper than the
#: parser's recursion limit (``RecursionError``); an unreadable file (``OSError``).
_METADATA_ERRORS: tuple[type[Exception], ...] = (OSError, ValueError, TypeError,
                                                 AttributeError, RecursionError)


def group_attributes(path: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The attributes of the zarr v3 group at `path`, or None if `path` holds no such group.

    Parameters
    ----------
    path : str or path
        A directory that may be a zarr v3 group.

    Returns
    -------
    dict or None
        The group's attributes (a new dict). None when `path` is not a zarr v3 group at all:
        it does not exist, is a file, has no ``zarr.json`` (a plain folder, a zarr v2 store),
        or its ``zarr.json`` describes an array.

    Raises
    ------
    InputFileError
        If ``zarr.json`` exists but cannot be read as a zarr v3 group's metadata: unreadable,
        truncated, not JSON, or not the fields zarr expects. The zarr or json error is the
        exception's ``__cause__``.

    Notes
    -----
    Reads only ``zarr.json`` and never warns, so it is cheap and quiet enough for probing
    paths that may not be stores at all (napari's ``get_reader``).
    """
    import zarr
    from zarr.errors import ContainsArrayError

    source = Path(path)
    meta = source / "zarr.json"
    if not meta.is_file():
        return None
    try:
        with warnings.catch_warnings():
            # A damaged file is reported by the exception below; zarr's own warnings about
            # it would only repeat that, or reach a caller that must stay quiet.
            warnings.simplefilter("ignore")
            group = zarr.open_group(zarr.storage.LocalStore(source, read_only=True),
                                    mode="r", zarr_format=3)
            attributes = group.attrs.asdict()
    except ContainsArrayError:
        return None
    except _METADATA_ERRORS as exc:
        detail = " ".join(str(exc).split())[:200]
        raise InputFileError(
            f"{meta}: not readable as zarr v3 group metadata ({type(exc).__name__}: {detail}); "
            "the store is damaged, restore it from a copy or write it again"
        ) from exc
    return dict(attributes)
