"""Region geometry in micrometres, its regions CSV file, and its voxels on a grid (no napari).

A :class:`RegionShape` is what a user drew: a ball (centre and radius) or a polygon (corners
on one depth plane, or through every plane). It lives in physical coordinates, the same as
napari's world coordinates of a volrecon store (the OME-NGFF scale and translation), so one
regions file applies to any store of the same sample. :meth:`RegionShape.region` turns it
into the :class:`~volrecon.napari.traces.Region` voxels of a :class:`SpatialGrid`; the time
traces widget and ``volrecon export --traces`` both go through it, so they average the same
voxels.

The regions CSV (``schemas/regions.schema.json`` describes one row) has the header
``name,kind,units,z,y,x,radius_um,half_thickness_planes,vertices_yx`` and one row per region:

- ``kind = ball``: centre ``z, y, x`` (``z`` empty on a grid without depth), ``radius_um``;
- ``kind = polygon``: ``vertices_yx`` as ``"y x;y x;…"`` (3 corners or more), ``z`` the depth
  of its plane (empty: every plane), ``half_thickness_planes`` planes either side (default 0);
- ``units``: ``um`` (physical coordinates) or ``px`` (voxel indices of the store's grid, voxel
  ``i`` centred on ``i``; converted with the store's scale on reading).
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np

from volrecon.errors import ConfigError, InputFileError, ShapeError
from volrecon.napari.traces import Region, ball_region, polygon_region

__all__ = [
    "REGION_CSV_COLUMNS",
    "RegionShape",
    "SpatialGrid",
    "read_regions_csv",
    "write_regions_csv",
]

REGION_CSV_COLUMNS = ("name", "kind", "units", "z", "y", "x", "radius_um",
                      "half_thickness_planes", "vertices_yx")
#: Voxel coordinates are rounded to this many decimals, so a region written in micrometres
#: and read back covers the same voxels (the conversion is exact only to a few ulps).
VOXEL_DECIMALS = 6


@dataclass(frozen=True)
class SpatialGrid:
    """The spatial grid of a store or image layer.

    Attributes
    ----------
    shape : tuple of int
        ``(Z, Y, X)`` or ``(Y, X)``.
    voxel_um : tuple of float
        Voxel size per axis, micrometres.
    origin_um : tuple of float
        Physical position of voxel 0 per axis, micrometres.
    """

    shape: tuple[int, ...]
    voxel_um: tuple[float, ...]
    origin_um: tuple[float, ...]

    def _axes(self, coordinates: np.ndarray) -> int:
        d = int(coordinates.shape[-1])
        if d > len(self.shape):
            raise ConfigError(f"{d} coordinates given for a grid of {len(self.shape)} axes "
                              f"{self.shape}; leave z empty for frames without depth")
        return d

    def to_voxels(self, position_um: np.ndarray) -> np.ndarray:
        """Voxel coordinates of physical positions ``(..., D)`` on the last D axes."""
        d = self._axes(position_um)
        voxels = (position_um - np.asarray(self.origin_um[-d:])) / np.asarray(self.voxel_um[-d:])
        rounded: np.ndarray = np.round(voxels, VOXEL_DECIMALS)
        return rounded

    def to_um(self, voxels: np.ndarray) -> np.ndarray:
        """Physical positions of voxel coordinates ``(..., D)`` on the last D axes."""
        d = self._axes(voxels)
        position: np.ndarray = np.asarray(self.origin_um[-d:]) + voxels * np.asarray(
            self.voxel_um[-d:])
        return position


@dataclass(frozen=True, eq=False)
class RegionShape:
    """A drawn region in physical coordinates (micrometres).

    Attributes
    ----------
    name : str
        Label (CSV column headers of the traces).
    kind : {"ball", "polygon"}
    center_um : ndarray of shape (D,), optional
        Ball centre ``(z, y, x)`` or ``(y, x)``.
    radius_um : float, optional
        Ball radius.
    vertices_yx_um : ndarray of shape (N, 2), optional
        Polygon corners ``(y, x)``.
    z_um : float, optional
        Depth of the polygon's plane; None: every plane.
    half_thickness_planes : int
        Planes either side of the polygon's plane that also belong to it.
    """

    name: str
    kind: Literal["ball", "polygon"]
    center_um: np.ndarray | None = None
    radius_um: float | None = None
    vertices_yx_um: np.ndarray | None = None
    z_um: float | None = None
    half_thickness_planes: int = 0

    def region(self, grid: SpatialGrid) -> Region:
        """The voxels of `grid` this shape covers (see ``ball_region``, ``polygon_region``).

        Raises
        ------
        ConfigError
            If the shape lies off the grid, covers no voxel or does not fit the grid's axes.
        """
        if self.kind == "ball":
            if self.center_um is None or self.radius_um is None:
                raise ConfigError(f"{self.name}: a ball needs a centre and a radius")
            if len(self.center_um) != len(grid.shape):
                raise ConfigError(f"{self.name}: ball centre has {len(self.center_um)} "
                                  f"coordinates, the volume {len(grid.shape)} axes; give z, y, x "
                                  "(z empty only for 2-D frames)")
            return ball_region(grid.to_voxels(self.center_um), self.radius_um, grid.shape,
                               grid.voxel_um, name=self.name)
        if self.vertices_yx_um is None:
            raise ConfigError(f"{self.name}: a polygon needs its corners")
        outline = grid.to_voxels(self.vertices_yx_um)
        planes = None
        if len(grid.shape) == 3 and self.z_um is not None:
            z = int(np.rint(round((self.z_um - grid.origin_um[0]) / grid.voxel_um[0],
                                  VOXEL_DECIMALS)))
            h = self.half_thickness_planes
            planes = (max(0, z - h), min(grid.shape[0], z + h + 1))
            if planes[0] >= planes[1]:
                raise ConfigError(f"{self.name}: depth {self.z_um:g} µm (plane {z}) is outside "
                                  f"the volume's planes 0..{grid.shape[0] - 1}")
        return polygon_region(outline, grid.shape, planes=planes, name=self.name)


def _number(text: str, where: str, column: str) -> float | None:
    if not text.strip():
        return None
    try:
        value = float(text)
    except ValueError:
        raise ConfigError(f"{where}: column '{column}' is {text!r}, not a number") from None
    if not math.isfinite(value):
        raise ConfigError(f"{where}: column '{column}' is {text!r}; give a finite number")
    return value


def _parse_row(row: dict[str, str], where: str, grid: SpatialGrid | None) -> RegionShape:
    name = (row.get("name") or "").strip()
    kind = (row.get("kind") or "").strip()
    units = (row.get("units") or "").strip()
    if not name:
        raise ConfigError(f"{where}: column 'name' is empty; give each region a name")
    if kind not in ("ball", "polygon"):
        raise ConfigError(f"{where}: kind {kind!r} is not 'ball' or 'polygon'")
    if units not in ("um", "px"):
        raise ConfigError(f"{where}: units {units!r} is not 'um' or 'px'")
    if units == "px" and grid is None:
        raise ConfigError(f"{where}: units 'px' need the store's grid; give micrometres")

    def to_um(values: np.ndarray) -> np.ndarray:
        return values if units == "um" or grid is None else grid.to_um(values)

    z, y, x = (_number(row.get(c) or "", where, c) for c in ("z", "y", "x"))
    if kind == "ball":
        radius = _number(row.get("radius_um") or "", where, "radius_um")
        if y is None or x is None or radius is None:
            raise ConfigError(f"{where}: a ball needs y, x and radius_um (and z for volumes)")
        centre = np.array([y, x] if z is None else [z, y, x], dtype=np.float64)
        return RegionShape(name, "ball", center_um=to_um(centre), radius_um=radius)
    text = (row.get("vertices_yx") or "").strip()
    try:
        vertices = np.array([[float(v) for v in pair.split()] for pair in text.split(";")
                             if pair.strip()], dtype=np.float64)
    except ValueError:
        raise ConfigError(f"{where}: vertices_yx {text!r} is not 'y x;y x;…' numbers") from None
    if vertices.ndim != 2 or vertices.shape[1] != 2 or len(vertices) < 3:
        raise ConfigError(f"{where}: vertices_yx needs 3 or more 'y x' pairs; got {text!r}")
    thickness = _number(row.get("half_thickness_planes") or "", where, "half_thickness_planes")
    if thickness is not None and (thickness < 0 or thickness != int(thickness)):
        raise ConfigError(f"{where}: half_thickness_planes must be a whole number >= 0")
    z_um = z
    if z is not None and units == "px" and grid is not None and len(grid.shape) == 3:
        z_um = grid.origin_um[0] + z * grid.voxel_um[0]
    return RegionShape(name, "polygon", vertices_yx_um=to_um(vertices), z_um=z_um,
                       half_thickness_planes=int(thickness or 0))


def read_regions_csv(path: str | os.PathLike[str], *, grid: SpatialGrid | None = None
                     ) -> list[RegionShape]:
    """Read a regions CSV (see the module notes for its columns).

    Parameters
    ----------
    path : str or path
        The file.
    grid : SpatialGrid, optional
        The grid that rows in ``px`` refer to (needed only for them).

    Raises
    ------
    InputFileError
        If the file cannot be read.
    ConfigError
        For a missing column, a bad row (named by its line number), a repeated name or no
        region at all.
    """
    source = Path(path)
    try:
        with source.open(newline="", encoding="utf-8") as handle:
            reader = csv.DictReader(handle)
            missing = [c for c in ("name", "kind", "units") if c not in (reader.fieldnames or [])]
            if missing:
                raise ConfigError(f"{source}: no column {', '.join(missing)} in the header; the "
                                  f"header is {','.join(REGION_CSV_COLUMNS)}")
            shapes = [_parse_row(row, f"{source} line {reader.line_num}", grid)
                      for row in reader]
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(f"{source}: cannot read the regions file ({exc}); check the "
                             "path") from exc
    if not shapes:
        raise ConfigError(f"{source}: no regions; add one row per region below the header")
    names = [s.name for s in shapes]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ConfigError(f"{source}: region names {', '.join(repeated)} appear more than once; "
                          "give each region its own name")
    return shapes


def _text(value: float | None) -> str:
    return "" if value is None else repr(float(value))


def write_regions_csv(path: str | os.PathLike[str], shapes: Sequence[RegionShape]) -> Path:
    """Write `shapes` as a regions CSV in micrometres (replaced if it exists)."""
    if not shapes:
        raise ShapeError("no regions to write")
    target = Path(path)
    with target.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(REGION_CSV_COLUMNS)
        for s in shapes:
            if s.kind == "ball" and s.center_um is not None:
                c = [float(v) for v in s.center_um]
                z, y, x = (None, *c) if len(c) == 2 else c
                writer.writerow([s.name, "ball", "um", _text(z), _text(y), _text(x),
                                 _text(s.radius_um), "", ""])
            elif s.vertices_yx_um is not None:
                corners = ";".join(f"{float(a)!r} {float(b)!r}" for a, b in s.vertices_yx_um)
                writer.writerow([s.name, "polygon", "um", _text(s.z_um), "", "", "",
                                 str(s.half_thickness_planes), corners])
    return target
