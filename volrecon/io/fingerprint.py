"""Content fingerprints of input files: cheap enough for 100 GB videos, strict enough to notice
a different file behind the same name.

A fingerprint is a string ``"<method>:<sha256 hex>"``. It depends on file contents and sizes,
never on paths or modification times, so a video copied to another disk keeps its fingerprint.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np

from volrecon.errors import InputFileError
from volrecon.io.frames import FrameSource, TiffFrames, TiffGlobFrames, ZarrFrames
from volrecon.io.hdf5 import Hdf5Frames

__all__ = ["fingerprint_file", "fingerprint_frames", "fingerprint_tree"]

#: Bytes hashed at each end of a large file.
SAMPLE_BYTES = 1 << 20


def fingerprint_file(path: str | os.PathLike[str], *, sample_bytes: int = SAMPLE_BYTES) -> str:
    """Fingerprint one file from its size and its first, middle and last `sample_bytes`.

    Files up to ``3 * sample_bytes`` are hashed whole (method ``sha256``); larger ones by the
    three samples (method ``sha256-sampled``), which reads 3 MiB whatever the file size.

    Raises
    ------
    InputFileError
        If the file cannot be read.
    """
    path = os.fspath(path)
    digest = hashlib.sha256()
    try:
        size = os.path.getsize(path)
        digest.update(size.to_bytes(8, "little"))
        with open(path, "rb") as handle:
            if size <= 3 * sample_bytes:
                digest.update(handle.read())
                return f"sha256:{digest.hexdigest()}"
            for offset in (0, (size - sample_bytes) // 2, size - sample_bytes):
                handle.seek(offset)
                digest.update(handle.read(sample_bytes))
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read the file to fingerprint it ({exc})") from exc
    return f"sha256-sampled:{digest.hexdigest()}"


def fingerprint_tree(path: str | os.PathLike[str]) -> str:
    """Fingerprint a directory (a model store) from every file's relative path and contents.

    Temporary ``*.partial`` files of interrupted zarr writes are skipped.

    Raises
    ------
    InputFileError
        If `path` is not a directory or a file cannot be read.
    """
    root = Path(path)
    if not root.is_dir():
        raise InputFileError(f"{root}: not a directory; cannot fingerprint it")
    digest = hashlib.sha256()
    try:
        for file in sorted(p for p in root.rglob("*") if p.is_file()):
            if file.name.endswith(".partial"):
                continue
            digest.update(file.relative_to(root).as_posix().encode() + b"\0")
            digest.update(file.read_bytes())
            digest.update(b"\0")
    except OSError as exc:
        raise InputFileError(f"{root}: cannot read the store to fingerprint it ({exc})") from exc
    return f"sha256-tree:{digest.hexdigest()}"


def fingerprint_frames(source: FrameSource) -> str:
    """Fingerprint the video behind a frame reader.

    A TIFF file: :func:`fingerprint_file`. A glob: the number and names of the files plus the
    first and last file. A zarr array: its shape, dtype and first and last frame. An HDF5
    dataset: its name inside the file and the file's fingerprint.
    """
    digest = hashlib.sha256()
    digest.update(repr((source.shape, source.dtype.str)).encode())
    if isinstance(source, TiffFrames):
        return fingerprint_file(source.path)
    if isinstance(source, TiffGlobFrames):
        for name in source.paths:
            digest.update(os.path.basename(name).encode() + b"\0")
        for name in {source.paths[0], source.paths[-1]}:
            digest.update(fingerprint_file(name).encode())
        return f"sha256-glob:{digest.hexdigest()}"
    if isinstance(source, Hdf5Frames):
        digest.update(source.dataset.encode() + b"\0" + fingerprint_file(source.path).encode())
        return f"sha256-hdf5:{digest.hexdigest()}"
    if isinstance(source, ZarrFrames):
        for index in sorted({0, source.n_frames - 1}):
            digest.update(np.ascontiguousarray(source.read(index, index + 1)).tobytes())
        return f"sha256-zarr:{digest.hexdigest()}"
    raise TypeError(f"no fingerprint for {type(source).__name__}")
