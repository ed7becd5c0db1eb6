"""HDF5 input through h5py: a lazy frame reader and the whole-array read of a bead scan.

The file is opened inside every read, so a reader pickles for dask processes and clusters
(h5py file handles do not). ``import hdf5plugin`` before each open registers the compression
filters that acquisition software uses beyond gzip (Blosc, LZ4, Zstd, bitshuffle).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from volrecon.errors import InputFileError
from volrecon.io.frames import FrameSource

__all__ = ["HDF5_SUFFIXES", "Hdf5Frames", "is_hdf5", "read_hdf5_array"]

#: File name endings taken to mean HDF5; content decides for every other name.
HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".he5", ".nxs")
_SIGNATURE = b"\x89HDF\r\n\x1a\n"


def is_hdf5(path: str) -> bool:
    """True if the file starts with the HDF5 signature (at byte 0 or a user-block boundary).

    Reads at most a few 8-byte windows; h5py is not imported.
    """
    try:
        with open(path, "rb") as handle:
            size = os.fstat(handle.fileno()).st_size
            offset = 0
            while offset + len(_SIGNATURE) <= size:
                handle.seek(offset)
                if handle.read(len(_SIGNATURE)) == _SIGNATURE:
                    return True
                offset = 512 if offset == 0 else offset * 2
    except OSError:
        return False
    return False


def _open_file(path: str, key: str) -> Any:
    """The h5py File, read-only, with every filter of hdf5plugin registered."""
    import h5py
    import hdf5plugin  # noqa: F401  (registers the compression filters on import)

    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise InputFileError(
            f"{path}: not a readable HDF5 file ({exc}); the file is truncated or damaged, "
            f"copy it again (or check {key})"
        ) from exc


def _image_datasets(handle: Any, ranks: tuple[int, ...]) -> list[tuple[str, tuple[int, ...]]]:
    import h5py

    found: list[tuple[str, tuple[int, ...]]] = []

    def visit(name: str, node: Any) -> None:
        if isinstance(node, h5py.Dataset) and node.ndim in ranks:
            found.append(("/" + name, tuple(int(n) for n in node.shape)))

    handle.visititems(visit)
    return found


def _find_dataset(handle: Any, path: str, dataset: str, *, ranks: tuple[int, ...],
                  key: str) -> Any:
    """The dataset at `dataset`, or the file's only one of rank `ranks[0]` (then the others)."""
    import h5py

    if not dataset:
        for rank in ranks:
            candidates = _image_datasets(handle, (rank,))
            if len(candidates) == 1:
                return handle[candidates[0][0]]
            if len(candidates) > 1:
                listed = ", ".join(f"{name} {shape}" for name, shape in candidates)
                raise InputFileError(
                    f"{path}: holds {len(candidates)} {rank}-D datasets ({listed}); set "
                    f"{key} to the one to read"
                )
        raise InputFileError(
            f"{path}: holds no {' or '.join(f'{r}-D' for r in ranks)} dataset; write the "
            f"frames as one (T, Y, X) dataset (or set {key})"
        )
    try:
        node = handle[dataset]
    except (KeyError, ValueError) as exc:
        others = ", ".join(name for name, _ in _image_datasets(handle, (2, 3, 4))) or "none"
        raise InputFileError(
            f"{path}: no dataset '{dataset}' in the file; set {key} to one of its image "
            f"datasets ({others})"
        ) from exc
    if not isinstance(node, h5py.Dataset):
        inside = ", ".join(name for name, _ in _image_datasets(node, (2, 3, 4))) or "none"
        raise InputFileError(
            f"{path}: '{dataset}' is an HDF5 group, not a dataset; set {key} to one of the "
            f"datasets inside it ({inside}, relative to the group)"
        )
    return node


def _check_dtype(node: Any, path: str) -> np.dtype[Any]:
    dtype: np.dtype[Any] = np.dtype(node.dtype)
    if dtype.kind not in "uif":
        raise InputFileError(
            f"{path}: dataset '{node.name}' holds {dtype}; expected integer or floating-point "
            "grayscale pixels (write it as uint8, uint16 or float32)"
        )
    native: np.dtype[Any] = dtype.newbyteorder("=")
    return native


@dataclass(frozen=True)
class Hdf5Frames(FrameSource):
    """A ``(T, Y, X)`` (or one ``(Y, X)`` frame) HDF5 dataset, read in chunk-aligned pieces.

    Attributes
    ----------
    path : str
        The HDF5 file.
    dataset : str
        The dataset's absolute path inside the file (``/entry/data``).
    chunk_frames : int
        Frames per HDF5 chunk along t (the whole dataset when it is not chunked). A read
        decodes each chunk it touches once; dask chunks that are multiples of this value
        decode no chunk twice.
    """

    path: str = ""
    dataset: str = ""
    chunk_frames: int = 1

    @property
    def description(self) -> str:
        return f"{self.path}:{self.dataset}"

    @classmethod
    def open(cls, path: str | os.PathLike[str], dataset: str = "", *,
             key: str = "[video] dataset") -> Hdf5Frames:
        """Check an HDF5 dataset of frames and return its reader.

        Parameters
        ----------
        path : str or path
            The HDF5 file.
        dataset : str, optional
            Path of the dataset inside the file. Default: the file's only 3-D dataset (or
            its only 2-D one, a single frame).
        key : str
            The job-file key that names the dataset, for messages.

        Raises
        ------
        InputFileError
            If the file is not readable HDF5 (truncated, damaged), the dataset is missing,
            ambiguous, a group, not 2-D or 3-D, or not of a real dtype.
        """
        path = os.fspath(path)
        with _open_file(path, key) as handle:
            node = _find_dataset(handle, path, dataset, ranks=(3, 2), key=key)
            if node.ndim not in (2, 3):
                raise InputFileError(
                    f"{path}: dataset '{node.name}' has shape {node.shape}; expected "
                    f"(T, Y, X) frames; set {key} to a 3-D dataset"
                )
            dtype = _check_dtype(node, path)
            shape = tuple(int(n) for n in node.shape)
            chunks = node.chunks
            name = str(node.name)
        if len(shape) == 2:
            shape = (1, *shape)
            chunk_frames = 1
        else:
            chunk_frames = int(chunks[0]) if chunks is not None else shape[0]
        return cls(shape=shape, dtype=dtype,  # type: ignore[arg-type]
                   path=path, dataset=name, chunk_frames=chunk_frames)

    def _read(self, start: int, stop: int) -> np.ndarray:
        out = np.empty((stop - start, *self.shape[1:]), dtype=self.dtype)
        with _open_file(self.path, "[video] path") as handle:
            node = handle[self.dataset]
            if node.ndim == 2:
                node.read_direct(out, np.s_[:, :], np.s_[0])
                return out
            if tuple(node.shape[1:]) != self.shape[1:] or node.shape[0] < stop:
                raise InputFileError(
                    f"{self.description}: the dataset now has shape {node.shape}, "
                    f"{self.shape} when the job began; the file was changed, restore it"
                )
            # One piece per HDF5 chunk along t: each chunk decoded once, straight into `out`.
            first = start
            while first < stop:
                last = min(stop, (first // self.chunk_frames + 1) * self.chunk_frames)
                node.read_direct(out, np.s_[first:last], np.s_[first - start:last - start])
                first = last
        return out


def read_hdf5_array(path: str | os.PathLike[str], dataset: str = "", *,
                    what: str = "bead scan", key: str = "the dataset") -> np.ndarray:
    """Read a whole image dataset (a bead scan, a dark frame) from an HDF5 file.

    Parameters
    ----------
    path : str or path
        The HDF5 file.
    dataset : str, optional
        Path of the dataset. Default: the file's only dataset of 4, 3 or 2 axes (tried in
        that order).
    what : str
        What the array is, for messages.
    key : str
        The option that names the dataset, for messages.

    Returns
    -------
    ndarray
        As stored (native byte order), shape as stored.

    Raises
    ------
    InputFileError
        If the file is damaged, the dataset is missing or ambiguous, or not real-valued.
    """
    path = os.fspath(path)
    with _open_file(path, key) as handle:
        node = _find_dataset(handle, path, dataset, ranks=(4, 3, 2), key=key)
        if node.ndim < 2:
            raise InputFileError(f"{path}: dataset '{node.name}' of the {what} has shape "
                                 f"{node.shape}; expected an image stack (Z, Y, X)")
        dtype = _check_dtype(node, path)
        try:
            return np.asarray(node[()], dtype=dtype)
        except OSError as exc:
            raise InputFileError(
                f"{path}: cannot read dataset '{node.name}' of the {what} ({exc}); the file "
                "is damaged or needs a filter hdf5plugin lacks, export it again"
            ) from exc
