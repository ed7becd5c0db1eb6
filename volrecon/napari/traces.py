"""Intensity over time in regions of a 4-D reconstruction (no napari or Qt needed).

A :class:`Region` is a boolean mask inside a bounding box of the spatial grid. Regions come
from points (a ball of a given radius in micrometres) or from drawn polygons, rectangles and
ellipses (a prism through one or more depth planes). :func:`region_means` averages each
region per frame (lazily for dask input), :func:`delta_f_over_f` turns traces into relative
changes, and :func:`write_traces_csv` saves them.
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from volrecon.errors import ConfigError, DataError, ShapeError

__all__ = [
    "Region",
    "ball_region",
    "delta_f_over_f",
    "ellipse_vertices",
    "polygon_region",
    "region_means",
    "write_traces_csv",
]


@dataclass(frozen=True, eq=False)
class Region:
    """Voxels of one region of a spatial grid (``(Z, Y, X)`` or ``(Y, X)``).

    Attributes
    ----------
    name : str
        Label used in plots and CSV headers.
    box : tuple of slice
        Bounding box on the grid, one slice per spatial axis.
    mask : ndarray of bool
        Which voxels of the box belong to the region (shape of the box, at least one True).
    """

    name: str
    box: tuple[slice, ...]
    mask: np.ndarray

    @property
    def n_voxels(self) -> int:
        """Number of voxels in the region."""
        return int(np.count_nonzero(self.mask))


def _clip_box(low: np.ndarray, high: np.ndarray, shape: Sequence[int]) -> tuple[slice, ...]:
    return tuple(slice(int(max(0, lo)), int(min(n, hi))) for lo, hi, n in zip(low, high, shape,
                                                                              strict=True))


def ball_region(center: ArrayLike, radius_um: float, shape: Sequence[int],
                voxel_um: ArrayLike, *, name: str = "point") -> Region:
    """Voxels whose centres lie within `radius_um` of `center` (an ellipsoid in voxels).

    Parameters
    ----------
    center : sequence of float
        Centre in voxel coordinates, one per spatial axis (``(z, y, x)`` or ``(y, x)``);
        voxel ``i`` spans ``i - 0.5 .. i + 0.5``.
    radius_um : float
        Radius in micrometres, > 0. The voxel nearest to the centre is always included.
    shape : sequence of int
        Spatial grid shape.
    voxel_um : sequence of float
        Voxel size per axis, micrometres.
    name : str
        Region label.

    Raises
    ------
    ConfigError
        If the radius is not positive or the centre lies outside the grid.

    Examples
    --------
    >>> region = ball_region((2, 5, 5), 1.0, (4, 10, 10), (2.0, 1.0, 1.0))
    >>> region.n_voxels  # the centre and its 4 lateral neighbours; planes are 2 µm away
    5
    """
    c = np.asarray(center, dtype=np.float64)
    size = np.asarray(voxel_um, dtype=np.float64)
    if not (math.isfinite(radius_um) and radius_um > 0):
        raise ConfigError(f"{name}: radius must be a positive number of micrometres; got "
                          f"{radius_um!r}")
    if c.shape != (len(shape),) or size.shape != c.shape:
        raise ShapeError(f"{name}: centre {tuple(c)} and voxel size {tuple(size)} need one value "
                         f"per axis of the grid {tuple(shape)}")
    nearest = np.rint(c).astype(int)
    if np.any(nearest < 0) or np.any(nearest >= np.asarray(shape)):
        where = tuple(float(v) for v in np.round(c, 2))
        raise ConfigError(f"{name}: centre {where} (voxels) is outside the volume "
                          f"{tuple(shape)}; place it on the volume")
    half = radius_um / size
    box = _clip_box(np.floor(c - half), np.ceil(c + half) + 1, shape)
    grids = np.meshgrid(*(np.arange(s.start, s.stop) for s in box), indexing="ij")
    distance2 = sum(((g - ci) * si) ** 2 for g, ci, si in zip(grids, c, size, strict=True))
    mask = distance2 <= radius_um**2
    mask[tuple(n - s.start for n, s in zip(nearest, box, strict=True))] = True
    return Region(name, box, mask)


def _inside_polygon(points_yx: np.ndarray, vertices_yx: np.ndarray) -> np.ndarray:
    """Even-odd rule: is each point strictly inside the closed polygon?"""
    y, x = points_yx[:, 0], points_yx[:, 1]
    inside = np.zeros(len(points_yx), dtype=bool)
    vy, vx = vertices_yx[:, 0], vertices_yx[:, 1]
    for i in range(len(vertices_yx)):
        y0, x0, y1, x1 = vy[i - 1], vx[i - 1], vy[i], vx[i]
        crosses = (y0 > y) != (y1 > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            x_at = x0 + (y - y0) * (x1 - x0) / (y1 - y0)
        inside ^= crosses & (x < x_at)
    return inside


def polygon_region(vertices_yx: Any, shape: Sequence[int], *, planes: tuple[int, int] | None = None,
                   name: str = "shape") -> Region:
    """Pixels whose centres lie inside a polygon, through the depth planes ``planes``.

    Parameters
    ----------
    vertices_yx : array_like of shape (N, 2)
        Polygon corners in voxel coordinates ``(y, x)``, N >= 3.
    shape : sequence of int
        Spatial grid shape, ``(Z, Y, X)`` or ``(Y, X)``.
    planes : (int, int), optional
        Half-open depth range ``start, stop`` for a 3-D grid; default all planes.
    name : str
        Region label.

    Raises
    ------
    ConfigError
        If the polygon has fewer than 3 corners, covers no pixel centre of the grid, or the
        planes are outside the volume.

    Examples
    --------
    >>> square = [(1.5, 1.5), (1.5, 4.5), (4.5, 4.5), (4.5, 1.5)]
    >>> region = polygon_region(square, (3, 8, 8), planes=(1, 2))
    >>> region.box, region.n_voxels
    ((slice(1, 2, None), slice(1, 6, None), slice(1, 6, None)), 9)
    """
    vertices = np.asarray(vertices_yx, dtype=np.float64)
    if vertices.ndim != 2 or vertices.shape[1] != 2 or len(vertices) < 3:
        raise ConfigError(f"{name}: a region needs a polygon of at least 3 (y, x) corners; got "
                          f"shape {vertices.shape}")
    ny, nx = shape[-2:]
    box_yx = _clip_box(np.floor(vertices.min(axis=0)), np.ceil(vertices.max(axis=0)) + 1,
                       (ny, nx))
    ys, xs = np.arange(box_yx[0].start, box_yx[0].stop), np.arange(box_yx[1].start,
                                                                  box_yx[1].stop)
    grid = np.stack(np.meshgrid(ys, xs, indexing="ij"), axis=-1).reshape(-1, 2)
    mask_yx = _inside_polygon(grid.astype(np.float64), vertices).reshape(len(ys), len(xs))
    if not mask_yx.any():
        raise ConfigError(f"{name}: the shape covers no pixel centre of the volume; draw it "
                          "larger or on the volume")
    if len(shape) == 2:
        return Region(name, box_yx, mask_yx)
    start, stop = (0, shape[0]) if planes is None else planes
    if not 0 <= start < stop <= shape[0]:
        raise ConfigError(f"{name}: depth planes {start}:{stop} are outside 0:{shape[0]}; "
                          "draw the shape on a plane of the volume")
    mask = np.broadcast_to(mask_yx, (stop - start, *mask_yx.shape)).copy()
    return Region(name, (slice(start, stop), *box_yx), mask)


def ellipse_vertices(corners_yx: Any, *, n_vertices: int = 64) -> np.ndarray:
    """Polygon approximating the ellipse inscribed in a (possibly rotated) rectangle.

    Parameters
    ----------
    corners_yx : array_like of shape (4, 2)
        The rectangle's corners in order around it (how napari stores an ellipse).
    n_vertices : int
        Corners of the approximating polygon.

    Returns
    -------
    ndarray of shape (n_vertices, 2)
    """
    corners = np.asarray(corners_yx, dtype=np.float64)
    if corners.shape != (4, 2):
        raise ConfigError(f"an ellipse needs its 4 bounding corners (y, x); got shape "
                          f"{corners.shape}")
    centre = corners.mean(axis=0)
    a = (corners[1] - corners[0]) / 2  # half of one side
    b = (corners[3] - corners[0]) / 2  # half of the other
    angle = np.linspace(0.0, 2 * np.pi, n_vertices, endpoint=False)[:, None]
    polygon: np.ndarray = centre + np.cos(angle) * a + np.sin(angle) * b
    return polygon


def region_means(volumes: Any, regions: Sequence[Region]) -> Any:
    """Mean intensity of each region in each frame.

    Parameters
    ----------
    volumes : ndarray or dask array of shape (T, *spatial)
        Frames first, then the grid the regions were made on.
    regions : sequence of Region
        At least one.

    Returns
    -------
    array of shape (T, R), float64
        numpy for numpy input; a lazy dask array for dask input, reading only the chunks
        that overlap the regions. A frame not yet reconstructed (NaN) gives NaN.

    Examples
    --------
    >>> import numpy as np
    >>> frames = np.arange(2 * 4 * 4, dtype=np.float32).reshape(2, 4, 4)
    >>> square = polygon_region([(0.5, 0.5), (0.5, 2.5), (2.5, 2.5), (2.5, 0.5)], (4, 4))
    >>> region_means(frames, [square]).ravel().tolist()  # pixels 5, 6, 9, 10 of each frame
    [7.5, 23.5]
    """
    if not regions:
        raise ConfigError("no regions: add points or shapes to the regions layer first")
    spatial = len(regions[0].box)
    if volumes.ndim != spatial + 1:
        raise ShapeError(f"volumes must have shape (T, {'Z, ' if spatial == 3 else ''}Y, X) to "
                         f"match the regions; got {tuple(volumes.shape)}")
    is_dask = hasattr(volumes, "dask")
    columns = []
    for region in regions:
        box = volumes[(slice(None), *region.box)]
        weights = region.mask.astype(np.float64) / region.n_voxels
        axes = tuple(range(1, spatial + 1))
        columns.append((box.astype(np.float64) * weights).sum(axis=axes))
    if is_dask:
        import dask.array as da

        return da.stack(columns, axis=1)  # type: ignore[no-untyped-call]
    return np.stack(columns, axis=1)


def delta_f_over_f(traces_tr: Any, *, baseline_percentile: float = 10.0) -> np.ndarray:
    """Relative change ``(F − F0) / F0`` of each trace, F0 a low percentile of the trace.

    Parameters
    ----------
    traces_tr : array_like of shape (T, R)
        Mean intensities per frame and region.
    baseline_percentile : float
        Percentile of each trace over time taken as F0, 0 to 100 (default 10, a common
        choice for sparse activity; NaN frames are ignored).

    Returns
    -------
    ndarray of shape (T, R), float64

    Raises
    ------
    DataError
        If a region's baseline is not positive (ΔF/F is undefined there).

    Examples
    --------
    >>> delta_f_over_f([[10.0], [15.0], [20.0]], baseline_percentile=0).ravel().tolist()
    [0.0, 0.5, 1.0]
    """
    traces = np.asarray(traces_tr, dtype=np.float64)
    if not 0 <= baseline_percentile <= 100:
        raise ConfigError(f"baseline_percentile must be 0 to 100; got {baseline_percentile}")
    if traces.ndim != 2:
        raise ShapeError(f"traces must have shape (T, R); got {traces.shape}")
    with np.errstate(all="ignore"):
        finite = np.isfinite(traces).any(axis=0)
        baseline = np.full(traces.shape[1], np.nan)
        if finite.any():
            baseline[finite] = np.nanpercentile(traces[:, finite], baseline_percentile, axis=0)
    bad = ~(baseline > 0)
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        raise DataError(f"region {r}: baseline F0 = {baseline[r]:.3g} is not positive, so ΔF/F "
                        "is undefined; move the region onto signal or plot raw intensity")
    relative: np.ndarray = (traces - baseline) / baseline
    return relative


def write_traces_csv(path: str | os.PathLike[str], traces_tr: Any, *, names: Sequence[str],
                     time_s: Any, value: str = "mean", first_frame: int = 0) -> Path:
    """Write traces as CSV: columns ``frame, time_s`` and one per region.

    Parameters
    ----------
    path : str or path
        File to write (replaced if it exists).
    traces_tr : array_like of shape (T, R)
    names : sequence of str
        R column names.
    time_s : array_like of shape (T,)
        Time of each frame, seconds.
    value : str
        What the numbers are (``"mean"`` or ``"dF/F"``); written into each region header.
    first_frame : int
        Frame number of the first row (the ``frame`` column counts on from it).

    Returns
    -------
    Path
        The file written.
    """
    traces = np.asarray(traces_tr, dtype=np.float64)
    times = np.asarray(time_s, dtype=np.float64)
    if traces.ndim != 2 or traces.shape[1] != len(names) or times.shape != (traces.shape[0],):
        raise ShapeError(f"traces {traces.shape}, {len(names)} names and {times.shape} times "
                         "do not match: need (T, R), R names and T times")
    target = Path(path)
    with target.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["frame", "time_s", *(f"{n} {value}" for n in names)])
        for t, (when, row) in enumerate(zip(times, traces, strict=True)):
            writer.writerow([first_frame + t, repr(float(when)), *(repr(float(v)) for v in row)])
    return target
