"""Regions drawn in the viewer (a Points, Shapes or Labels layer) on the grid of an image layer.

Works on napari layer objects through their public coordinate transforms only (widgets get
the viewer behind napari's public-only proxy); needs no Qt.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from volrecon.errors import ConfigError
from volrecon.napari.region_shapes import RegionShape, SpatialGrid
from volrecon.napari.traces import Region, ellipse_vertices

__all__ = [
    "frame_times_s",
    "image_grid",
    "labels_layer_data",
    "layer_regions",
    "layer_shapes",
    "shapes_layer_data",
]

#: Shape types that enclose an area.
AREA_SHAPES = ("rectangle", "polygon", "ellipse")
#: Columns of the features table that :func:`shapes_layer_data` writes and
#: :func:`layer_shapes` reads back.
SHAPE_FEATURES = ("name", "kind", "radius_um", "half_thickness_planes", "all_planes")


def image_grid(image: Any) -> SpatialGrid:
    """The spatial grid of an image layer with time first (its scale and translation).

    The volrecon reader gives layers no other transform; regions are placed with these two.
    """
    if image.ndim not in (3, 4):
        raise ConfigError(f"layer '{image.name}' has {image.ndim} axes; traces need (t, z, y, x) "
                          "or (t, y, x) with time first")
    data = image.data[0] if image.multiscale else image.data
    return SpatialGrid(shape=tuple(int(n) for n in data.shape[1:]),
                       voxel_um=tuple(float(s) for s in image.scale[1:]),
                       origin_um=tuple(float(t) for t in image.translate[1:]))


def _world(layer: Any, position: Any) -> np.ndarray:
    return np.asarray(layer.data_to_world(np.asarray(position, dtype=np.float64)),
                      dtype=np.float64)


def _features(layer: Any) -> list[dict[str, Any]] | None:
    table = getattr(layer, "features", None)
    if table is None or "kind" not in table.columns or len(table) != len(layer.data):
        return None
    return [dict(zip(table.columns, row, strict=True)) for row in table.itertuples(index=False)]


def layer_shapes(image: Any, regions: Any, *, radius_um: float = 2.0,
                 half_thickness_planes: int = 0) -> list[RegionShape]:
    """The region of each point or closed shape of `regions`, in world coordinates (µm).

    Parameters
    ----------
    image : napari Image layer
        Frames first: ``(T, Z, Y, X)`` or ``(T, Y, X)``; its scale is taken as micrometres.
    regions : napari Points or Shapes layer
        Points become balls of `radius_um`; rectangles, polygons and ellipses become prisms
        through the plane they were drawn on (± `half_thickness_planes`), or through every
        plane when the shapes layer has no depth axis. Lines and paths are skipped. A Shapes
        layer made by :func:`shapes_layer_data` gives back the regions it was made from (its
        features table holds their names, kinds and radii).
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

    grid = image_grid(image)
    depth = len(grid.shape) == 3
    found: list[RegionShape] = []
    if isinstance(regions, Points):
        for i, point in enumerate(np.asarray(regions.data, dtype=np.float64)):
            world = _world(regions, point)
            if len(world) < len(grid.shape):
                raise ConfigError(f"layer '{regions.name}' has no depth axis; draw the points "
                                  "in a layer with z (add it while viewing the volume)")
            found.append(RegionShape(f"point {i}", "ball", center_um=world[-len(grid.shape):],
                                     radius_um=radius_um))
    elif isinstance(regions, Shapes):
        if half_thickness_planes < 0:
            raise ConfigError(f"half_thickness_planes must be 0 or more; got "
                              f"{half_thickness_planes}")
        features = _features(regions)
        for i, (vertices, shape_type) in enumerate(zip(regions.data, regions.shape_type,
                                                       strict=True)):
            if shape_type not in AREA_SHAPES:
                continue
            saved = features[i] if features is not None else {}
            name = str(saved.get("name", f"{shape_type} {i}"))
            world = np.array([_world(regions, v) for v in vertices])
            outline = world[:, -2:]
            has_z = depth and world.shape[1] >= 3
            z_um = float(world[:, -3].mean()) if has_z else None
            if saved.get("kind") == "ball" and shape_type == "ellipse":
                centre = outline.mean(axis=0)
                found.append(RegionShape(name, "ball", radius_um=float(saved["radius_um"]),
                                         center_um=np.array([z_um, *centre]) if depth and
                                         z_um is not None else centre))
                continue
            if shape_type == "ellipse":
                outline = ellipse_vertices(outline)
            thickness = (int(saved["half_thickness_planes"]) if "half_thickness_planes" in saved
                         else half_thickness_planes)
            if bool(saved.get("all_planes", False)):
                z_um = None
            found.append(RegionShape(name, "polygon", vertices_yx_um=outline, z_um=z_um,
                                     half_thickness_planes=thickness))
    else:
        raise ConfigError(f"layer '{regions.name}' is a {regions.__class__.__name__} layer; "
                          "choose a Points, Shapes or Labels layer for the regions")
    if not found:
        raise ConfigError(f"layer '{regions.name}' has no points or closed shapes; add some "
                          "(rectangles, polygons, ellipses) first")
    return found


def _label_regions(image: Any, labels: Any) -> list[Region]:
    grid = image_grid(image)
    data = np.asarray(labels.data)
    if data.shape != grid.shape:
        raise ConfigError(f"layer '{labels.name}' has shape {data.shape}, the image's grid "
                          f"{grid.shape}; paint labels on a layer of the volume's shape")
    found = []
    for value in np.unique(data[data > 0]):
        mask = data == value
        box = tuple(slice(int(ix.min()), int(ix.max()) + 1) for ix in np.nonzero(mask))
        found.append(Region(f"label {int(value)}", box, mask[box]))
    if not found:
        raise ConfigError(f"layer '{labels.name}' has no labels; paint some first")
    return found


def layer_regions(image: Any, regions: Any, *, radius_um: float = 2.0,
                  half_thickness_planes: int = 0) -> list[Region]:
    """Voxels of each region of `regions` on the grid of `image`.

    Points and Shapes layers go through :func:`layer_shapes` (same arguments) and
    :meth:`RegionShape.region`; a Labels layer of the image's spatial shape gives one region
    per label value (``"label N"``).
    """
    from napari.layers import Labels

    if isinstance(regions, Labels):
        return _label_regions(image, regions)
    grid = image_grid(image)
    return [shape.region(grid) for shape in layer_shapes(
        image, regions, radius_um=radius_um, half_thickness_planes=half_thickness_planes)]


def shapes_layer_data(shapes: list[RegionShape], grid: SpatialGrid, *, name: str = "regions"
                      ) -> tuple[list[np.ndarray], dict[str, Any], str]:
    """napari layer data ``(data, kwargs, "shapes")`` of `shapes` in world coordinates.

    Polygons become polygons on their plane (a polygon through every plane sits on the middle
    plane, marked ``all_planes``); balls become ellipses around their centre. The features
    table keeps what :func:`layer_shapes` needs to give the same regions back.
    """
    depth = len(grid.shape) == 3
    middle = grid.origin_um[0] + grid.voxel_um[0] * (grid.shape[0] - 1) / 2 if depth else 0.0
    data: list[np.ndarray] = []
    types: list[str] = []
    features: dict[str, list[Any]] = {column: [] for column in SHAPE_FEATURES}
    for shape in shapes:
        if shape.kind == "ball" and shape.center_um is not None and shape.radius_um is not None:
            *z, cy, cx = (float(v) for v in shape.center_um)
            r = shape.radius_um
            outline = np.array([(cy - r, cx - r), (cy - r, cx + r), (cy + r, cx + r),
                                (cy + r, cx - r)])
            plane = z[0] if z else middle
            types.append("ellipse")
        elif shape.vertices_yx_um is not None:
            outline = np.asarray(shape.vertices_yx_um, dtype=np.float64)
            plane = middle if shape.z_um is None else shape.z_um
            types.append("polygon")
        else:
            continue
        if depth:
            outline = np.column_stack([np.full(len(outline), plane), outline])
        data.append(outline)
        features["name"].append(shape.name)
        features["kind"].append(shape.kind)
        features["radius_um"].append(shape.radius_um if shape.radius_um is not None else 0.0)
        features["half_thickness_planes"].append(shape.half_thickness_planes)
        features["all_planes"].append(shape.kind == "polygon" and shape.z_um is None)
    return data, {"shape_type": types, "features": features, "name": name,
                  "ndim": 3 if depth else 2, "edge_width": 0.0, "face_color": "transparent",
                  "edge_color": "yellow"}, "shapes"


def labels_layer_data(regions: list[Region], grid: SpatialGrid, *, name: str = "region labels"
                      ) -> tuple[np.ndarray, dict[str, Any], str]:
    """napari layer data of `regions` as labels 1..R on the grid (later regions on top)."""
    if len(regions) >= np.iinfo(np.uint16).max:
        raise ConfigError(f"{len(regions)} regions do not fit a uint16 labels layer")
    labels = np.zeros(grid.shape, np.uint16)
    for value, region in enumerate(regions, start=1):
        view = labels[region.box]
        view[region.mask] = value
    return labels, {"name": name, "scale": list(grid.voxel_um),
                    "translate": list(grid.origin_um)}, "labels"


def frame_times_s(image: Any) -> np.ndarray:
    """Time of each frame of `image` in seconds (its scale and translation along axis 0)."""
    n = int(image.data.shape[0])
    return float(image.translate[0]) + float(image.scale[0]) * np.arange(n, dtype=np.float64)
