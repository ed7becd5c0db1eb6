"""Regions drawn in the viewer (a Points or Shapes layer) on the grid of an image layer.

Works on napari layer objects through their public coordinate transforms only (widgets get
the viewer behind napari's public-only proxy); needs no Qt.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from volrecon.errors import ConfigError
from volrecon.napari.traces import Region, ball_region, ellipse_vertices, polygon_region

__all__ = ["frame_times_s", "layer_regions"]

#: Shape types that enclose an area.
AREA_SHAPES = ("rectangle", "polygon", "ellipse")


def _to_image_data(position: np.ndarray, source: Any, image: Any) -> np.ndarray:
    """A position in `source`'s data coordinates as spatial data coordinates of `image`."""
    world = np.asarray(source.data_to_world(position), dtype=np.float64)
    return np.asarray(image.world_to_data(world), dtype=np.float64)[1:]


def layer_regions(image: Any, regions: Any, *, radius_um: float = 2.0,
                  half_thickness_planes: int = 0) -> list[Region]:
    """Regions of each point or closed shape of `regions`, on the grid of `image`.

    Parameters
    ----------
    image : napari Image layer
        Frames first: ``(T, Z, Y, X)`` or ``(T, Y, X)``; its scale is taken as micrometres.
    regions : napari Points or Shapes layer
        Points become balls of `radius_um`; rectangles, polygons and ellipses become prisms
        through the plane they were drawn on (± `half_thickness_planes`), or through every
        plane when the shapes layer has no depth axis. Lines and paths are skipped.
    radius_um : float
        Ball radius around each point, micrometres.
    half_thickness_planes : int
        Planes on either side of a shape's plane that also belong to its region.

    Raises
    ------
    ConfigError
        If the layers are unsuitable or hold no usable point or shape.
    """
    from napari.layers import Points, Shapes

    if image.ndim not in (3, 4):
        raise ConfigError(f"layer '{image.name}' has {image.ndim} axes; traces need (t, z, y, x) "
                          "or (t, y, x) with time first")
    spatial_shape = tuple(int(n) for n in image.data.shape[1:])
    voxel_um = [float(s) for s in image.scale[1:]]
    found: list[Region] = []
    if isinstance(regions, Points):
        for i, point in enumerate(np.asarray(regions.data, dtype=np.float64)):
            centre = _to_image_data(point, regions, image)
            found.append(ball_region(centre, radius_um, spatial_shape, voxel_um,
                                     name=f"point {i}"))
    elif isinstance(regions, Shapes):
        if half_thickness_planes < 0:
            raise ConfigError(f"half_thickness_planes must be 0 or more; got "
                              f"{half_thickness_planes}")
        for i, (vertices, shape_type) in enumerate(zip(regions.data, regions.shape_type,
                                                       strict=True)):
            if shape_type not in AREA_SHAPES:
                continue
            mapped = np.array([_to_image_data(v, regions, image) for v in vertices])
            outline = mapped[:, -2:]
            if shape_type == "ellipse":
                outline = ellipse_vertices(outline)
            planes = None
            if len(spatial_shape) == 3 and np.asarray(vertices).shape[1] >= 3:
                z = int(np.rint(mapped[:, 0].mean()))
                planes = (max(0, z - half_thickness_planes),
                          min(spatial_shape[0], z + half_thickness_planes + 1))
            found.append(polygon_region(outline, spatial_shape, planes=planes,
                                        name=f"{shape_type} {i}"))
    else:
        raise ConfigError(f"layer '{regions.name}' is a {regions.__class__.__name__} layer; "
                          "choose a Points or Shapes layer for the regions")
    if not found:
        raise ConfigError(f"layer '{regions.name}' has no points or closed shapes; add some "
                          "(rectangles, polygons, ellipses) first")
    return found


def frame_times_s(image: Any) -> np.ndarray:
    """Time of each frame of `image` in seconds (its scale and translation along axis 0)."""
    n = int(image.data.shape[0])
    return float(image.translate[0]) + float(image.scale[0]) * np.arange(n, dtype=np.float64)
