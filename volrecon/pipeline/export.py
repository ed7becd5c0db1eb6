"""Export a job's volumes (or their max projections) as an ImageJ hyperstack TIFF, and the
mean intensity over time in regions as a traces CSV."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.errors import ConfigError, InputFileError, OutputWriteError, VolreconError
from volrecon.io.files import replacing
from volrecon.io.ome_zarr import parse_ome_image
from volrecon.pipeline.store import DAMAGE_ERRORS, JobStore

__all__ = ["export_tiff", "export_traces", "parse_frame_range"]

#: ImageJ hyperstacks are classic TIFF: keep well below the 4 GiB offset limit.
MAX_IMAGEJ_BYTES = 4_000_000_000
PROJECTION_KINDS = ("max",)


def parse_frame_range(text: str | None, n_frames: int) -> slice:
    """Parse ``"a:b"`` (either side optional, half-open, negative counts from the end).

    Raises
    ------
    ConfigError
        If the text is not of that form or the range is empty.
    """
    if text is None:
        return slice(0, n_frames)
    parts = text.split(":")
    try:
        if len(parts) != 2:
            raise ValueError(text)
        start = int(parts[0]) if parts[0].strip() else None
        stop = int(parts[1]) if parts[1].strip() else None
    except ValueError:
        raise ConfigError(f"--frames {text!r}: expected start:stop, e.g. 0:100") from None
    first, last, _ = slice(start, stop).indices(n_frames)
    if last <= first:
        raise ConfigError(
            f"--frames {text!r} selects no frame of the {n_frames} in the store; use a range "
            f"inside 0:{n_frames}"
        )
    return slice(first, last)


def export_tiff(store_path: str | os.PathLike[str], tiff_path: str | os.PathLike[str], *,
                frames: str | None = None, projection: str | None = None) -> Path:
    """Write store frames as an ImageJ-compatible float32 hyperstack.

    Parameters
    ----------
    store_path : str or path
        A job's output store.
    tiff_path : str or path
        The TIFF to write (replaced if it exists).
    frames : str, optional
        ``"a:b"`` store frames (half-open); default all.
    projection : {"max"}, optional
        Export the maximum projection along z (axes TYX) instead of the volumes (TZYX).

    Returns
    -------
    Path
        `tiff_path`.

    Notes
    -----
    Frames are read and written one at a time, so memory holds one volume. Frames not yet
    reconstructed, or failed, are NaN. The file records the voxel size (resolution in
    pixels per micrometre, ``spacing`` in micrometres) and ``finterval`` in seconds.

    Raises
    ------
    InputFileError
        If `store_path` is not a volrecon output store, or a selected frame's chunk is damaged.
    OutputWriteError
        If `tiff_path` cannot be written (a folder, below a file, disk full); an existing file
        there is left unchanged.
    ConfigError
        For a bad frame range or projection, or a result over ImageJ's 4 GB limit.
    """
    import tifffile

    if projection is not None and projection not in PROJECTION_KINDS:
        raise ConfigError(f"--projection {projection!r}: use one of {', '.join(PROJECTION_KINDS)}")
    store = JobStore.open(store_path, mode="r")
    image = store.image
    selected = parse_frame_range(frames, store.n_frames)
    scale = parse_ome_image(store.group.attrs.asdict(), source=store_path).levels[0].scale
    finterval, spacing, pixel_y, pixel_x = scale
    _, nz, ny, nx = image.shape
    n_out = selected.stop - selected.start
    projected = projection is not None
    shape = (n_out, ny, nx) if projected else (n_out, nz, ny, nx)
    size = int(np.prod(shape)) * 4
    if size > MAX_IMAGEJ_BYTES:
        raise ConfigError(
            f"{store_path}: {n_out} frames make {size / 1e9:.1f} GB, over the ImageJ TIFF limit "
            "of 4 GB; export fewer frames with --frames or use --projection max"
        )
    source = None
    if projected and "projections" in store.group:
        source = store.group["projections/max_z"]

    def read(array: Any, t: int) -> np.ndarray:
        try:
            return np.asarray(array[t], dtype=np.float32)
        except DAMAGE_ERRORS as exc:
            raise InputFileError(
                f"{store.path}: frame {t} of '{array.path}' cannot be read (chunk files "
                f"{array.path}/c/{t}/…: {exc}); the store is damaged there: export other "
                "frames with --frames, or recompute the job with --restart"
            ) from exc

    def planes() -> Iterator[np.ndarray]:
        for t in range(selected.start, selected.stop):
            if projected:
                plane = read(source, t) if source is not None else np.max(read(image, t), axis=0)
                yield plane
            else:
                yield from read(image, t)

    out = Path(tiff_path)
    if out.is_dir():
        raise OutputWriteError(f"--tiff {out}: is a folder; give the name of a TIFF file")
    metadata = {"axes": "TYX" if projected else "TZYX", "unit": "um", "finterval": finterval}
    if not projected:
        metadata["spacing"] = spacing
    # Written beside the target and renamed at the end: an export that fails half-way leaves
    # an existing file of that name as it was.
    try:
        with replacing(out) as partial, tifffile.TiffWriter(partial, imagej=True) as writer:
            writer.write(planes(), shape=shape, dtype=np.float32,
                         resolution=(1.0 / pixel_x, 1.0 / pixel_y), metadata=metadata)
    except OSError as exc:
        if isinstance(exc, VolreconError):
            raise
        raise OutputWriteError(
            f"--tiff {out}: cannot write the file ({exc.strerror or exc}); choose a path in a "
            "writable folder with enough free space"
        ) from exc
    return out


def export_traces(store_path: str | os.PathLike[str], regions_path: str | os.PathLike[str],
                  traces_path: str | os.PathLike[str], *, frames: str | None = None) -> Path:
    """Write the mean intensity per frame of each region of a regions CSV as a traces CSV.

    Parameters
    ----------
    store_path : str or path
        A job's output store.
    regions_path : str or path
        A regions CSV (``volrecon.napari.region_shapes``; the time-traces widget writes
        them): coordinates in micrometres (the store's physical coordinates) or voxels.
    traces_path : str or path
        The CSV to write (replaced if it exists): ``frame, time_s`` and one column per region,
        as the widget's "Export CSV". Frames not done are NaN.
    frames : str, optional
        ``"a:b"`` store frames (half-open); default all.

    Returns
    -------
    Path
        `traces_path`.

    Notes
    -----
    The regions are placed on the store's grid with its OME scale and translation and
    averaged with the same functions as the widget (``RegionShape.region``,
    ``region_means``), reading only the chunks they touch.

    Raises
    ------
    InputFileError
        If the store or the regions file cannot be read, or a chunk is damaged.
    ConfigError
        For a bad regions row, a region off the volume or a bad frame range.
    OutputWriteError
        If `traces_path` cannot be written; an existing file there is left unchanged.
    """
    import dask.array as da

    from volrecon.napari.region_shapes import SpatialGrid, read_regions_csv
    from volrecon.napari.traces import region_means, write_traces_csv

    store = JobStore.open(store_path, mode="r")
    selected = parse_frame_range(frames, store.n_frames)
    level = parse_ome_image(store.group.attrs.asdict(), source=store_path).levels[0]
    grid = SpatialGrid(shape=tuple(int(n) for n in store.image.shape[1:]),
                       voxel_um=tuple(float(s) for s in level.scale[1:]),
                       origin_um=tuple(float(t) for t in level.translation[1:]))
    shapes = read_regions_csv(regions_path, grid=grid)
    try:
        regions = [shape.region(grid) for shape in shapes]
    except ConfigError as exc:
        raise ConfigError(f"{regions_path}: region {exc}") from exc
    out = Path(traces_path)
    if out.is_dir():
        raise OutputWriteError(f"--out {out}: is a folder; give the name of a CSV file")
    volumes = da.from_zarr(store.image)[selected]  # type: ignore[no-untyped-call]
    try:
        means = np.asarray(region_means(volumes, regions).compute())
    except DAMAGE_ERRORS as exc:
        raise InputFileError(f"{store.path}: a chunk of frames {selected.start}:{selected.stop} "
                             f"cannot be read ({exc}); the store is damaged there: export other "
                             "frames with --frames, or run volrecon verify") from exc
    times = level.translation[0] + level.scale[0] * np.arange(selected.start, selected.stop,
                                                              dtype=np.float64)
    try:
        with replacing(out) as partial:
            write_traces_csv(partial, means, names=[r.name for r in regions], time_s=times,
                             first_frame=selected.start)
    except OSError as exc:
        if isinstance(exc, VolreconError):
            raise
        raise OutputWriteError(
            f"--out {out}: cannot write the file ({exc.strerror or exc}); choose a path in a "
            "writable folder") from exc
    return out
