"""Save and load PSF models as zarr v3 groups (layout: ``schemas/psf-model.schema.json``).

A model store is a directory holding a zarr group whose attribute ``volrecon_model`` names
the model kind, the format version, the geometry and the kind's own attributes; each array
the kind needs is a child array of the group. Writes go to a temporary sibling directory that
is renamed into place, so a failed save never leaves a partial model behind.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.backend import physical_memory_bytes
from volrecon.errors import InputFileError, ModelStoreError
from volrecon.io.files import replacing
from volrecon.io.zarr_groups import group_attributes
from volrecon.models.base import Geometry, PSFModel

if TYPE_CHECKING:
    import dask.array as da

__all__ = [
    "FORMAT_VERSION",
    "MODEL_ATTRIBUTE",
    "StoredModel",
    "load_model",
    "model_kinds",
    "open_model_store",
    "save_model",
]

FORMAT_VERSION = 1
MODEL_ATTRIBUTE = "volrecon_model"


def model_kinds() -> dict[str, type[PSFModel]]:
    """Every model kind a store can hold, by its ``kind`` name."""
    from volrecon.models.depth_convolution import DepthConvolutionPSF

    kinds: dict[str, type[PSFModel]] = {DepthConvolutionPSF.kind: DepthConvolutionPSF}
    for cls in _subclasses(PSFModel):  # type: ignore[type-abstract]
        kind = getattr(cls, "kind", None)
        if isinstance(kind, str):
            kinds.setdefault(kind, cls)
    return kinds


def _subclasses(cls: type[PSFModel]) -> list[type[PSFModel]]:
    found: list[type[PSFModel]] = []
    for sub in cls.__subclasses__():
        found.append(sub)
        found.extend(_subclasses(sub))
    return found


def save_model(model: PSFModel, path: str | os.PathLike[str]) -> None:
    """Write `model` to a new zarr store at `path`, replacing an existing model store there."""
    import zarr
    from zarr.codecs import ZstdCodec

    target = Path(path)
    if target.exists() and not _is_model_store(target):
        raise ModelStoreError(
            f"{target}: exists and is not a volrecon model store; choose another output path"
        )
    target.parent.mkdir(parents=True, exist_ok=True)
    g = model.geometry
    attributes = {
        "kind": model.kind,
        "format_version": FORMAT_VERSION,
        "shape_zyx": list(model.shape_in),
        "dtype": model.dtype.name,
        "depth_step_um": g.depth_step_um,
        "pixel_size_um": g.pixel_size_um,
        "depth_start_um": g.depth_start_um,
        "operator_norm_squared": model._norm_cache.get("value"),
        "parameters": model.store_attributes(),
    }
    with replacing(target) as tmp:
        root = zarr.open_group(zarr.storage.LocalStore(tmp), mode="w", zarr_format=3)
        for key, array in model.store_arrays().items():
            array = np.ascontiguousarray(array)
            root.create_array(key, shape=array.shape, dtype=array.dtype, chunks=array.shape,
                              compressors=ZstdCodec(level=3), fill_value=0)[...] = array
        root.attrs[MODEL_ATTRIBUTE] = json.loads(json.dumps(attributes))


def _is_model_store(path: Path) -> bool:
    """True when `path` is a group with the model attribute (False if it is damaged)."""
    try:
        attributes = group_attributes(path)
    except InputFileError:
        return False
    return attributes is not None and MODEL_ATTRIBUTE in attributes


#: What zarr raises on damaged array metadata or chunks (a codec error is a RuntimeError),
#: and what a model's own checks raise (ValueError subclasses).
_READ_ERRORS: tuple[type[Exception], ...] = (ValueError, TypeError, OSError, RuntimeError,
                                             IndexError, AttributeError, ArithmeticError)
_CHUNK_ERRORS: tuple[type[Exception], ...] = (KeyError, *_READ_ERRORS)


@dataclass(frozen=True)
class StoredModel:
    """A PSF model store opened by :func:`open_model_store`: its metadata, arrays not read.

    Attributes
    ----------
    path : Path
        The store.
    kind : str
        The model kind named in the store (not checked against the kinds this volrecon
        knows; :func:`load_model` does that).
    geometry : Geometry
        Depth step, pixel size and first depth, in micrometres.
    dtype : str
        The compute dtype the model was saved with (``"float32"``).
    operator_norm_squared : float or None
        The stored estimate of ``||A||^2``, if the model had one.
    parameters : dict
        The kind's own attributes (``PSFModel.store_attributes``).
    attributes : dict
        The whole ``volrecon_model`` attribute as stored.
    arrays : dict of str to zarr.Array
        The store's arrays by key, opened but not read.
    """

    path: Path
    kind: str
    geometry: Geometry
    dtype: str
    operator_norm_squared: float | None
    parameters: dict[str, Any]
    attributes: dict[str, Any]
    arrays: dict[str, Any] = field(repr=False)

    def lazy_array(self, key: str) -> da.Array:
        """The stored array `key` as a dask array, one dask chunk per zarr chunk.

        Nothing is read until the dask array is computed.

        Raises
        ------
        ModelStoreError
            If the store has no array `key`.
        """
        import dask.array as da

        if key not in self.arrays:
            raise ModelStoreError(
                f"{self.path}: {self.kind} model store lacks array '{key}'; the store is "
                "incomplete, re-run calibration"
            )
        lazy: da.Array = da.from_zarr(self.arrays[key])  # type: ignore[no-untyped-call]
        return lazy

    def read_arrays(self) -> dict[str, np.ndarray]:
        """Every stored array, read into memory.

        Raises
        ------
        ModelStoreError
            If the arrays declare more bytes than this machine's memory, a chunk cannot be
            read, or an array is all zero.
        """
        declared = sum(int(array.nbytes) for array in self.arrays.values())
        if declared > physical_memory_bytes():
            raise ModelStoreError(
                f"{self.path}: its arrays declare {declared} bytes, more than this machine's "
                "memory; the store's metadata is damaged, re-run calibration"
            )
        try:
            arrays = {key: np.asarray(array[...]) for key, array in self.arrays.items()}
        except _CHUNK_ERRORS as exc:
            raise ModelStoreError(
                f"{self.path}: cannot read model store ({exc}); re-run calibration") from exc
        for key, array in arrays.items():
            if array.size and array.dtype.kind in "uif" and not np.any(array):
                raise ModelStoreError(
                    f"{self.path}: array '{key}' is all zero, so the model would turn every "
                    "volume into a black frame; re-run calibration with a bead scan that "
                    "shows the bead"
                )
        return arrays


def open_model_store(path: str | os.PathLike[str]) -> StoredModel:
    """Open a model written by :func:`save_model` and check its metadata; read no pixels.

    Parameters
    ----------
    path : str or path
        A store written by ``PSFModel.save`` or ``volrecon calibrate``.

    Returns
    -------
    StoredModel
        The store's kind, geometry and attributes, and its arrays opened lazily.

    Raises
    ------
    ModelStoreError
        If `path` is missing, is not a zarr v3 group, has damaged metadata, is not a volrecon
        model store, is from an unsupported format version, has attributes of the wrong type,
        or an array folder without its metadata.
    """
    import zarr

    source = Path(path)
    if not source.exists():
        raise ModelStoreError(
            f"{source}: no such model store; run 'volrecon calibrate' to make one")
    try:
        attributes = group_attributes(source)
    except InputFileError as exc:
        raise ModelStoreError(
            f"{source}: the model store's metadata (zarr.json) is damaged "
            f"({type(exc.__cause__).__name__}); re-run calibration"
        ) from exc
    if attributes is None:
        raise ModelStoreError(
            f"{source}: not a zarr v3 store (no zarr.json of a group); pass a directory written "
            "by 'volrecon calibrate' or PSFModel.save"
        )
    info = attributes.get(MODEL_ATTRIBUTE)
    if not isinstance(info, dict):
        raise ModelStoreError(
            f"{source}: zarr store without the '{MODEL_ATTRIBUTE}' attribute, so not a volrecon "
            "PSF model; pass a directory written by 'volrecon calibrate' or PSFModel.save"
        )
    version = info.get("format_version")
    if not isinstance(version, int) or version > FORMAT_VERSION or version < 1:
        raise ModelStoreError(
            f"{source}: model format_version {version!r} is not supported by this volrecon "
            f"(reads 1..{FORMAT_VERSION}); upgrade volrecon or re-run calibration"
        )
    kind = info.get("kind")
    if not isinstance(kind, str):
        raise ModelStoreError(
            f"{source}: attribute '{MODEL_ATTRIBUTE}/kind' is {kind!r}, not a name; known "
            f"kinds: {', '.join(sorted(model_kinds()))}"
        )
    norm = info.get("operator_norm_squared")
    if norm is not None and not (isinstance(norm, int | float) and not isinstance(norm, bool)
                                 and math.isfinite(norm) and norm > 0):
        raise ModelStoreError(
            f"{source}: attribute '{MODEL_ATTRIBUTE}/operator_norm_squared' is {norm!r}, not a "
            "positive number; re-run calibration"
        )
    parameters = info.get("parameters", {})
    if not isinstance(parameters, dict):
        raise ModelStoreError(
            f"{source}: attribute '{MODEL_ATTRIBUTE}/parameters' is not a table; re-run "
            "calibration"
        )
    dtype = info.get("dtype", "float32")
    if not isinstance(dtype, str):
        raise ModelStoreError(
            f"{source}: attribute '{MODEL_ATTRIBUTE}/dtype' is {dtype!r}, not a dtype name; "
            "re-run calibration"
        )
    for child in sorted(source.iterdir()):
        if child.is_dir() and not (child / "zarr.json").is_file():
            raise ModelStoreError(
                f"{source}: '{child.name}' has no zarr.json (the array's metadata); the store "
                "is incomplete, re-run calibration"
            )
    try:
        geometry = Geometry(float(info["depth_step_um"]), float(info["pixel_size_um"]),
                            float(info.get("depth_start_um", 0.0)))
        root = zarr.open_group(zarr.storage.LocalStore(source, read_only=True), mode="r",
                               zarr_format=3)
        arrays = dict(root.arrays())
    except KeyError as exc:
        raise ModelStoreError(
            f"{source}: model store lacks {exc.args[0]!r}; the store is incomplete, "
            "re-run calibration"
        ) from exc
    except _READ_ERRORS as exc:
        raise ModelStoreError(
            f"{source}: cannot read model store ({exc}); re-run calibration") from exc
    return StoredModel(path=source, kind=kind, geometry=geometry, dtype=dtype,
                       operator_norm_squared=None if norm is None else float(norm),
                       parameters=parameters, attributes=info, arrays=arrays)


def load_model(path: str | os.PathLike[str]) -> PSFModel:
    """Read a model written by :func:`save_model`.

    Raises
    ------
    ModelStoreError
        If `path` is missing, is not a volrecon model store, is from a newer format version,
        is of a kind this volrecon does not know, or lacks an array its kind needs (see
        :func:`open_model_store` and :meth:`StoredModel.read_arrays`).
    """
    stored = open_model_store(path)
    kinds = model_kinds()
    if stored.kind not in kinds:
        raise ModelStoreError(
            f"{stored.path}: attribute '{MODEL_ATTRIBUTE}/kind' is {stored.kind!r}; known "
            f"kinds: {', '.join(sorted(kinds))}"
        )
    arrays = stored.read_arrays()
    try:
        model = kinds[stored.kind].from_store(arrays, stored.parameters, stored.geometry,
                                              stored.dtype)
    except ModelStoreError:
        raise
    except KeyError as exc:
        raise ModelStoreError(
            f"{stored.path}: model store lacks {exc.args[0]!r}; the store is incomplete, "
            "re-run calibration"
        ) from exc
    except _READ_ERRORS as exc:
        raise ModelStoreError(
            f"{stored.path}: cannot read model store ({exc}); re-run calibration") from exc
    model._seed_norm(stored.operator_norm_squared)
    return model
