"""File-system helpers shared by every writer: replace a file or folder in one step."""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path

__all__ = ["replacing"]


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(OSError):
            path.unlink()


@contextlib.contextmanager
def replacing(target: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary sibling of `target`; when the block ends cleanly, move it onto `target`.

    Write the new file (or folder) at the yielded path. On success it replaces `target` with
    ``os.replace``; an existing folder at `target` is removed first when a folder was staged.
    Whatever happens, the temporary path is gone afterwards, so a failure half-way leaves
    `target` as it was. Exceptions from the block or from the rename propagate unchanged.
    """
    target = Path(target)
    staging = target.with_name(f".{target.name}.{uuid.uuid4().hex}.partial")
    try:
        yield staging
        if staging.is_dir() and target.exists():
            shutil.rmtree(target)
        os.replace(staging, target)
    finally:
        _remove(staging)
