"""Write 4-D ``(t, z, y, x)`` images as OME-Zarr 0.5 (OME-NGFF 0.5 on zarr v3).

The metadata is written by hand, as the specification lays it out: the image group's
attributes hold ``{"ome": {"version": "0.5", "multiscales": [...]}}``, the level array ``"0"``
carries ``dimension_names`` equal to the axis names, and each level has exactly one ``scale``
transform with one value per axis (the frame interval included).
"""

from __future__ import annotations

import math
import os
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import ConfigError

if TYPE_CHECKING:
    import zarr

__all__ = [
    "IMAGE_PATH",
    "OME_VERSION",
    "create_ome_image",
    "ome_image_attributes",
    "volume_chunks",
]

OME_VERSION = "0.5"
#: Path of the full-resolution level inside the image group.
IMAGE_PATH = "0"
AXES_TZYX = ("t", "z", "y", "x")
#: Largest chunk written by default (bytes); larger volumes are split along z.
MAX_CHUNK_BYTES = 16 << 20


def ome_image_attributes(*, scale_tzyx: tuple[float, float, float, float], name: str,
                         translation_tzyx: tuple[float, float, float, float] | None = None,
                         time_unit: str = "second", space_unit: str = "micrometer"
                         ) -> dict[str, Any]:
    """The ``ome`` group attribute of a one-level 4-D image.

    Parameters
    ----------
    scale_tzyx : tuple of 4 floats
        Frame interval (in `time_unit`) and voxel size along z, y, x (in `space_unit`).
    name : str
        Name of the multiscale image.
    translation_tzyx : tuple of 4 floats, optional
        Position of voxel (0, 0, 0, 0) (e.g. the depth of plane 0); written after the scale.
    time_unit, space_unit : str
        UDUNITS-2 unit names as OME-NGFF requires (``"second"``, ``"micrometer"``; not
        abbreviations).

    Raises
    ------
    ConfigError
        If a scale is not a positive finite number.
    """
    scale = [float(s) for s in scale_tzyx]
    if len(scale) != 4 or not all(math.isfinite(s) and s > 0 for s in scale):
        raise ConfigError(f"scale_tzyx must be 4 positive numbers; got {scale_tzyx!r}")
    transforms: list[dict[str, Any]] = [{"type": "scale", "scale": scale}]
    if translation_tzyx is not None and any(float(v) != 0 for v in translation_tzyx):
        translation = [float(v) for v in translation_tzyx]
        if len(translation) != 4 or not all(math.isfinite(v) for v in translation):
            raise ConfigError(
                f"translation_tzyx must be 4 finite numbers; got {translation_tzyx!r}"
            )
        transforms.append({"type": "translation", "translation": translation})
    axes = [{"name": "t", "type": "time", "unit": time_unit}]
    axes += [{"name": n, "type": "space", "unit": space_unit} for n in AXES_TZYX[1:]]
    return {
        "version": OME_VERSION,
        "multiscales": [{
            "name": name,
            "axes": axes,
            "datasets": [{"path": IMAGE_PATH, "coordinateTransformations": transforms}],
        }],
    }


def volume_chunks(shape_zyx: tuple[int, int, int], *, itemsize: int = 4,
                  max_chunk_bytes: int = MAX_CHUNK_BYTES) -> tuple[int, int, int, int]:
    """Chunk shape ``(1, zc, Y, X)``: one frame per chunk, split along z to stay small.

    One frame per chunk keeps every chunk inside one frame, so tasks writing different frames
    never write the same chunk, whatever the task size.
    """
    nz, ny, nx = shape_zyx
    plane_bytes = max(1, ny * nx * itemsize)
    planes = max(1, min(nz, max_chunk_bytes // plane_bytes))
    return (1, planes, ny, nx)


def create_ome_image(path: str | os.PathLike[str], *, shape_tzyx: tuple[int, int, int, int],
                     scale_tzyx: tuple[float, float, float, float], name: str = "volumes",
                     translation_tzyx: tuple[float, float, float, float] | None = None,
                     chunks_tzyx: tuple[int, int, int, int] | None = None,
                     compression_level: int = 3, attributes: dict[str, Any] | None = None,
                     ) -> zarr.Group:
    """Create an empty float32 OME-Zarr 0.5 image group at `path` (which must not exist).

    Parameters
    ----------
    path : str or path
        New directory for the zarr v3 store.
    shape_tzyx : tuple of 4 ints
        Frames and volume shape.
    scale_tzyx : tuple of 4 floats
        Frame interval in seconds and voxel size in micrometres (z, y, x).
    name : str
        Multiscale image name.
    translation_tzyx : tuple of 4 floats, optional
        See :func:`ome_image_attributes`.
    chunks_tzyx : tuple of 4 ints, optional
        Default :func:`volume_chunks`.
    compression_level : int
        zstd level, 1 to 22.
    attributes : dict, optional
        Extra JSON group attributes (beside ``ome``), written with it.

    Returns
    -------
    zarr.Group
        The open group; the image is ``group["0"]``, filled with NaN until written.

    Notes
    -----
    Unwritten voxels read as NaN (the fill value), so frames not yet reconstructed are easy to
    tell apart from dark ones.
    """
    import zarr
    from zarr.codecs import ZstdCodec

    if not 1 <= compression_level <= 22:
        raise ConfigError(f"compression_level must be 1 to 22; got {compression_level}")
    shape = tuple(int(n) for n in shape_tzyx)
    chunks = chunks_tzyx or volume_chunks(shape[1:])  # type: ignore[arg-type]
    ome = ome_image_attributes(scale_tzyx=scale_tzyx, name=name,
                               translation_tzyx=translation_tzyx)  # checked before any write
    # The caller's attributes go into the group's first write, so a store interrupted at any
    # later moment is recognisable by them; "ome" follows once the image array exists.
    group = zarr.open_group(zarr.storage.LocalStore(os.fspath(path)), mode="w-", zarr_format=3,
                            attributes=dict(attributes or {}))
    group.create_array(IMAGE_PATH, shape=shape, chunks=chunks, dtype="float32",
                       compressors=ZstdCodec(level=compression_level), fill_value=np.nan,
                       dimension_names=list(AXES_TZYX))
    group.attrs.update({**(attributes or {}), "ome": ome})
    return group
