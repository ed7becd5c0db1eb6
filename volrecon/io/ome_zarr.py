"""Write 4-D ``(t, z, y, x)`` images as OME-Zarr 0.5 (OME-NGFF 0.5 on zarr v3), and read
their metadata back.

The metadata is written by hand, as the specification lays it out: the image group's
attributes hold ``{"ome": {"version": "0.5", "multiscales": [...]}}``, the level array ``"0"``
carries ``dimension_names`` equal to the axis names, and each level has exactly one ``scale``
transform with one value per axis (the frame interval included). :func:`parse_ome_image`
reads any OME-NGFF 0.5 image's first multiscale (several levels, a translation, transforms
shared by all levels), not only the ones written here.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import ConfigError, InputFileError

if TYPE_CHECKING:
    import zarr

__all__ = [
    "IMAGE_PATH",
    "OME_VERSION",
    "OmeImage",
    "OmeLevel",
    "chunk_codecs",
    "create_ome_image",
    "downsample_yx",
    "level_shape",
    "ome_image_attributes",
    "parse_ome_image",
    "pyramid_levels",
    "shard_shape",
    "volume_chunks",
]

OME_VERSION = "0.5"
#: Path of the full-resolution level inside the image group.
IMAGE_PATH = "0"
AXES_TZYX = ("t", "z", "y", "x")
#: Largest chunk written by default (bytes); larger volumes are split along z.
MAX_CHUNK_BYTES = 16 << 20
#: A pyramid ends at the first level whose longer side is at most this (pixels).
SMALLEST_LEVEL_PX = 64
#: Element types a store's frame arrays may take.
FRAME_DTYPES = ("float32", "float16")


def ome_image_attributes(*, scale_tzyx: tuple[float, float, float, float], name: str,
                         translation_tzyx: tuple[float, float, float, float] | None = None,
                         time_unit: str = "second", space_unit: str = "micrometer",
                         levels: int = 1) -> dict[str, Any]:
    """The ``ome`` group attribute of a 4-D image of `levels` resolution levels.

    Level ``k`` (array ``"k"``) is the ``2^k × 2^k`` lateral mean of level 0
    (:func:`downsample_yx`): its y and x scale are ``2^k`` times level 0's, and its voxel
    ``(i, j)`` sits at the centre of the block it averages, ``(2^k − 1) / 2`` level-0 pixels
    further along y and x.

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
    translation = [float(v) for v in (translation_tzyx or (0.0,) * 4)]
    if len(translation) != 4 or not all(math.isfinite(v) for v in translation):
        raise ConfigError(f"translation_tzyx must be 4 finite numbers; got {translation_tzyx!r}")
    if levels < 1:
        raise ConfigError(f"levels must be at least 1; got {levels}")
    datasets = []
    for level in range(levels):
        factor = 2.0**level
        level_scale = [*scale[:2], scale[2] * factor, scale[3] * factor]
        shift = (factor - 1.0) / 2.0
        level_translation = [*translation[:2], translation[2] + shift * scale[2],
                             translation[3] + shift * scale[3]]
        transforms: list[dict[str, Any]] = [{"type": "scale", "scale": level_scale}]
        if any(v != 0 for v in level_translation):
            transforms.append({"type": "translation", "translation": level_translation})
        datasets.append({"path": str(level), "coordinateTransformations": transforms})
    axes = [{"name": "t", "type": "time", "unit": time_unit}]
    axes += [{"name": n, "type": "space", "unit": space_unit} for n in AXES_TZYX[1:]]
    return {
        "version": OME_VERSION,
        "multiscales": [{
            "name": name,
            "axes": axes,
            "datasets": datasets,
        }],
    }


def pyramid_levels(shape_yx: tuple[int, int], *, smallest: int = SMALLEST_LEVEL_PX) -> int:
    """Levels of a pyramid halving y and x until the longer side is at most `smallest`.

    Examples
    --------
    >>> pyramid_levels((128, 128)), pyramid_levels((512, 384)), pyramid_levels((64, 40))
    (2, 4, 1)
    """
    levels, longest = 1, max(shape_yx)
    while longest > smallest:
        longest = -(-longest // 2)
        levels += 1
    return levels


def level_shape(shape: tuple[int, ...], level: int) -> tuple[int, ...]:
    """Shape of pyramid level `level` of an array of `shape` (last two axes y, x, halved
    `level` times, rounding up)."""
    factor = 2**level
    return (*shape[:-2], *(-(-n // factor) for n in shape[-2:]))


def downsample_yx(array: np.ndarray) -> np.ndarray:
    """The 2 × 2 mean over the last two axes (y, x), float32.

    An odd last row or column is averaged over the pixels it has (a 2 × 1, 1 × 2 or 1 × 1
    block), so every output pixel is the mean of the level-above pixels it covers.

    Examples
    --------
    >>> downsample_yx(np.arange(12, dtype=np.float32).reshape(3, 4)).tolist()
    [[2.5, 4.5], [8.5, 10.5]]
    """
    *lead, ny, nx = array.shape
    my, mx = -(-ny // 2), -(-nx // 2)
    padded = np.zeros((*lead, 2 * my, 2 * mx), np.float64)
    padded[..., :ny, :nx] = array
    sums = padded.reshape(*lead, my, 2, mx, 2).sum(axis=(-3, -1))
    counts = np.zeros((2 * my, 2 * mx))
    counts[:ny, :nx] = 1.0
    weights = counts.reshape(my, 2, mx, 2).sum(axis=(1, 3))
    mean: np.ndarray = (sums / weights).astype(np.float32)
    return mean


def chunk_codecs(compression_level: int = 3) -> list[Any]:
    """The bytes-to-bytes codecs of every array volrecon writes: zstd, then a CRC32C checksum.

    The checksum (zarr v3's ``crc32c`` codec, 4 bytes after the compressed chunk) makes any
    read of a damaged chunk fail with ``ValueError`` ("Stored and computed checksum do not
    match") instead of decoding wrong numbers.

    Raises
    ------
    ConfigError
        If `compression_level` is not 1 to 22.
    """
    from zarr.codecs import Crc32cCodec, ZstdCodec

    if not 1 <= compression_level <= 22:
        raise ConfigError(f"compression_level must be 1 to 22; got {compression_level}")
    return [ZstdCodec(level=compression_level), Crc32cCodec()]


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


def shard_shape(chunks: tuple[int, ...], shape: tuple[int, ...], *, shard_frames: int
                ) -> tuple[int, ...] | None:
    """Shard shape of a frame array: `shard_frames` frames of whole inner `chunks`.

    None when `shard_frames` is 1 (one file per chunk, no sharding). Along every other axis
    the shard spans the whole array, rounded up to whole chunks.

    Examples
    --------
    >>> shard_shape((1, 2, 8, 8), (100, 3, 8, 8), shard_frames=32)
    (32, 4, 8, 8)
    """
    if shard_frames < 1:
        raise ConfigError(f"shard_frames must be at least 1; got {shard_frames}")
    if shard_frames == 1:
        return None
    return (shard_frames, *(math.ceil(n / c) * c for n, c in
                            zip(shape[1:], chunks[1:], strict=True)))


def create_ome_image(path: str | os.PathLike[str], *, shape_tzyx: tuple[int, int, int, int],
                     scale_tzyx: tuple[float, float, float, float], name: str = "volumes",
                     translation_tzyx: tuple[float, float, float, float] | None = None,
                     chunks_tzyx: tuple[int, int, int, int] | None = None,
                     compression_level: int = 3, attributes: dict[str, Any] | None = None,
                     shard_frames: int = 1, levels: int = 1, dtype: str = "float32"
                     ) -> zarr.Group:
    """Create an empty OME-Zarr 0.5 image group at `path` (which must not exist).

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
        zstd level, 1 to 22 (chunks also carry a CRC32C checksum, see :func:`chunk_codecs`).
    attributes : dict, optional
        Extra JSON group attributes (beside ``ome``), written with it.
    shard_frames : int
        Frames per file: above 1 the image is a zarr v3 sharded array whose shards hold
        `shard_frames` frames of inner chunks `chunks_tzyx` (:func:`shard_shape`); 1 writes
        one file per chunk.
    levels : int
        Resolution levels: arrays ``"0"`` to ``"levels - 1"``, each half the one above along
        y and x (:func:`level_shape`; the caller writes :func:`downsample_yx` of each frame).
    dtype : {"float32", "float16"}
        Element type of every level.

    Returns
    -------
    zarr.Group
        The open group; the image is ``group["0"]`` (levels ``group["1"]`` …), filled with NaN
        until written.

    Notes
    -----
    Unwritten voxels read as NaN (the fill value), so frames not yet reconstructed are easy to
    tell apart from dark ones.
    """
    import zarr

    if dtype not in FRAME_DTYPES:
        raise ConfigError(f"dtype must be one of {', '.join(FRAME_DTYPES)}; got {dtype!r}")
    codecs = chunk_codecs(compression_level)
    shape = tuple(int(n) for n in shape_tzyx)
    ome = ome_image_attributes(scale_tzyx=scale_tzyx, name=name, levels=levels,
                               translation_tzyx=translation_tzyx)  # checked before any write
    # The caller's attributes go into the group's first write, so a store interrupted at any
    # later moment is recognisable by them; "ome" follows once the image array exists.
    group = zarr.open_group(zarr.storage.LocalStore(os.fspath(path)), mode="w-", zarr_format=3,
                            attributes=dict(attributes or {}))
    itemsize = np.dtype(dtype).itemsize
    for level in range(levels):
        shape_k = level_shape(shape, level)
        chunks = ((chunks_tzyx if level == 0 else None)
                  or volume_chunks(shape_k[1:], itemsize=itemsize))  # type: ignore[arg-type]
        group.create_array(str(level), shape=shape_k, chunks=chunks, dtype=dtype,
                           shards=shard_shape(chunks, shape_k, shard_frames=shard_frames),
                           compressors=codecs, fill_value=np.nan,
                           dimension_names=list(AXES_TZYX))
    group.attrs.update({**(attributes or {}), "ome": ome})
    return group


# ------------------------------------------------------------------------------------ read
_BAD_METADATA_FIX = ("the image's OME-NGFF metadata is damaged, write the image again (a "
                     "job's output store: re-run the job with --restart)")


@dataclass(frozen=True)
class OmeLevel:
    """One resolution level of an OME-NGFF image.

    Attributes
    ----------
    path : str
        Path of the level's array inside the image group.
    scale : tuple of float
        Physical step between neighbouring voxels along each axis, in the axis's unit.
    translation : tuple of float
        Physical position of voxel ``(0, …, 0)`` along each axis (zeros when none is given).
    """

    path: str
    scale: tuple[float, ...]
    translation: tuple[float, ...]


@dataclass(frozen=True)
class OmeImage:
    """The first multiscale of an OME-NGFF 0.5 image, as :func:`parse_ome_image` reads it.

    Attributes
    ----------
    name : str or None
        The multiscale's name, if it has one.
    axis_names : tuple of str
        Axis names in array order, e.g. ``("t", "z", "y", "x")``.
    axis_types : tuple of str or None
        ``"time"``, ``"space"``, ``"channel"`` or a custom type, per axis (None if not given).
    axis_units : tuple of str or None
        UDUNITS-2 unit name per axis (None if not given, as for a channel axis).
    levels : tuple of OmeLevel
        Resolution levels, highest resolution first, each with the whole coordinate
        transform from its voxel indices to physical coordinates.
    """

    name: str | None
    axis_names: tuple[str, ...]
    axis_types: tuple[str | None, ...]
    axis_units: tuple[str | None, ...]
    levels: tuple[OmeLevel, ...]


def parse_ome_image(attributes: Mapping[str, Any], *, source: str | os.PathLike[str]
                    ) -> OmeImage:
    """Read the first multiscale of an OME-NGFF 0.5 image group's attributes.

    Parameters
    ----------
    attributes : mapping
        The image group's attributes (e.g. from :func:`volrecon.io.group_attributes`);
        the OME metadata is ``attributes["ome"]``.
    source : str or path
        Where the attributes come from (the store's path), named in error messages.

    Returns
    -------
    OmeImage
        Axes, and for each level its array path, scale and translation. Transforms given for
        the whole multiscale are folded into each level's.

    Raises
    ------
    InputFileError
        If there is no ``ome`` attribute, its version is not ``"0.5"``, or ``multiscales``,
        its axes, datasets or coordinate transforms do not follow the specification: each
        level (and the multiscale, if it has transforms) needs exactly one ``scale``, then at
        most one ``translation``, with one finite number per axis.

    Notes
    -----
    A level maps voxel index :math:`i` to :math:`x = s_l \\odot i + t_l`, and transforms of
    the multiscale (:math:`s_m, t_m`) apply after it, so the level's whole transform is
    :math:`x = (s_m \\odot s_l) \\odot i + (s_m \\odot t_l + t_m)` (element-wise products).
    Transforms stored in a separate file (``"path"`` instead of values) are not read.

    Examples
    --------
    >>> ome = ome_image_attributes(scale_tzyx=(0.5, 2.0, 0.65, 0.65), name="volumes",
    ...                            translation_tzyx=(0.0, 10.0, 0.0, 0.0))
    >>> image = parse_ome_image({"ome": ome}, source="volumes.zarr")
    >>> image.axis_names, image.levels[0].path
    (('t', 'z', 'y', 'x'), '0')
    >>> image.levels[0].scale, image.levels[0].translation
    ((0.5, 2.0, 0.65, 0.65), (0.0, 10.0, 0.0, 0.0))
    """
    ome = attributes.get("ome")
    if not isinstance(ome, Mapping):
        raise InputFileError(
            f"{source}: no OME-NGFF metadata (attribute 'ome' is missing or not a table); "
            f"{_BAD_METADATA_FIX}"
        )
    version = ome.get("version")
    if version != OME_VERSION:
        raise InputFileError(
            f"{source}: attribute 'ome/version' is {_shown(version)}, not "
            f"'{OME_VERSION}'; open it with a reader of that OME-NGFF version, or write it "
            f"again as OME-NGFF {OME_VERSION}"
        )
    multiscales = ome.get("multiscales")
    if not (isinstance(multiscales, list) and multiscales
            and isinstance(multiscales[0], Mapping)):
        raise InputFileError(
            f"{source}: attribute 'ome/multiscales' is missing or malformed (expected a "
            f"non-empty list of tables; found {_shown(multiscales)}); {_BAD_METADATA_FIX}"
        )
    multiscale = multiscales[0]
    names, types, units = _axes(multiscale.get("axes"), source)
    where = "ome/multiscales/0"
    shared = multiscale.get("coordinateTransformations")
    shared_scale, shared_translation = ((1.0,) * len(names), (0.0,) * len(names))
    if shared is not None:
        shared_scale, shared_translation = _transforms(shared, where, names, source)
    datasets = multiscale.get("datasets")
    if not (isinstance(datasets, list) and datasets):
        raise InputFileError(
            f"{source}: '{where}/datasets' is missing or malformed (expected a non-empty "
            f"list; found {_shown(datasets)}); {_BAD_METADATA_FIX}"
        )
    levels = []
    for index, dataset in enumerate(datasets):
        here = f"{where}/datasets/{index}"
        path = dataset.get("path") if isinstance(dataset, Mapping) else None
        if not (isinstance(path, str) and path):
            raise InputFileError(
                f"{source}: '{here}' needs a 'path' naming the level's array; found "
                f"{_shown(dataset)}; {_BAD_METADATA_FIX}"
            )
        scale, translation = _transforms(dataset.get("coordinateTransformations"), here,
                                         names, source)
        levels.append(OmeLevel(
            path=path,
            scale=tuple(m * s for m, s in zip(shared_scale, scale, strict=True)),
            translation=tuple(m * t + u for m, t, u in zip(shared_scale, translation,
                                                           shared_translation, strict=True)),
        ))
    name = multiscale.get("name")
    return OmeImage(name=name if isinstance(name, str) else None, axis_names=names,
                    axis_types=types, axis_units=units, levels=tuple(levels))


def _axes(raw: Any, source: str | os.PathLike[str]
          ) -> tuple[tuple[str, ...], tuple[str | None, ...], tuple[str | None, ...]]:
    """Names, types and units of ``multiscales[0].axes``."""
    valid = isinstance(raw, list) and len(raw) > 0 and all(
        isinstance(axis, Mapping) and isinstance(axis.get("name"), str)
        and len(axis["name"]) > 0
        and all(isinstance(axis.get(key), str | None) for key in ("type", "unit"))
        for axis in raw)
    names = tuple(str(axis["name"]) for axis in raw) if valid else ()
    if not valid or len(set(names)) != len(names):
        raise InputFileError(
            f"{source}: 'ome/multiscales/0/axes' is missing or malformed (expected a list of "
            f"tables with distinct names and text types and units; found {_shown(raw)}); "
            f"{_BAD_METADATA_FIX}"
        )
    return (names, tuple(axis.get("type") for axis in raw),
            tuple(axis.get("unit") for axis in raw))


def _transforms(raw: Any, where: str, names: tuple[str, ...],
                source: str | os.PathLike[str]) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """(scale, translation) of a ``coordinateTransformations`` list: one scale, then at most
    one translation, each with one finite number per axis."""
    n = len(names)
    found: dict[str, tuple[float, ...]] = {}
    valid = isinstance(raw, list) and 1 <= len(raw) <= 2
    for kind, transform in zip(("scale", "translation"), raw if valid else [], strict=False):
        values = transform.get(kind) if isinstance(transform, Mapping) else None
        if not (isinstance(transform, Mapping) and transform.get("type") == kind
                and isinstance(values, list) and len(values) == n
                and all(_is_finite_number(v) for v in values)):
            valid = False
            break
        found[kind] = tuple(float(v) for v in values)
    if not valid:
        raise InputFileError(
            f"{source}: '{where}/coordinateTransformations' needs one scale, then at most one "
            f"translation, each with one finite number per axis ({', '.join(names)}); found "
            f"{_shown(raw)}; {_BAD_METADATA_FIX}"
        )
    return found["scale"], found.get("translation", (0.0,) * n)


def _is_finite_number(value: Any) -> bool:
    return (isinstance(value, int | float) and not isinstance(value, bool)
            and math.isfinite(value))


def _shown(value: Any, limit: int = 80) -> str:
    """A short one-line ``repr`` of a metadata value for an error message."""
    text = " ".join(repr(value).split())
    return text if len(text) <= limit else text[:limit] + "…"
