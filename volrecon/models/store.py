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
from pathlib import Path

import numpy as np

from volrecon.backend import physical_memory_bytes
from volrecon.errors import ModelStoreError
from volrecon.io.files import replacing
from volrecon.models.base import Geometry, PSFModel

__all__ = ["FORMAT_VERSION", "MODEL_ATTRIBUTE", "load_model", "model_kinds", "save_model"]

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
    try:
        meta = json.loads((path / "zarr.json").read_text())
    except (OSError, ValueError):
        return False
    return isinstance(meta, dict) and MODEL_ATTRIBUTE in meta.get("attributes", {})


def load_model(path: str | os.PathLike[str]) -> PSFModel:
    """Read a model written by :func:`save_model`.

    Raises
    ------
    ModelStoreError
        If `path` is missing, is not a volrecon model store, is from a newer format version,
        or lacks an array its kind needs.
    """
    import zarr

    source = Path(path)
    if not source.exists():
        raise ModelStoreError(
            f"{source}: no such model store; run 'volrecon calibrate' to make one")
    meta_file = source / "zarr.json"
    try:
        meta = json.loads(meta_file.read_text())
    except (OSError, ValueError) as exc:
        raise ModelStoreError(
            f"{source}: not a zarr v3 store (no readable zarr.json); pass a directory written by "
            "'volrecon calibrate' or PSFModel.save"
        ) from exc
    attributes = meta.get("attributes", {}) if isinstance(meta, dict) else {}
    info = attributes.get(MODEL_ATTRIBUTE) if isinstance(attributes, dict) else None
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
    kinds = model_kinds()
    kind = info.get("kind")
    if not isinstance(kind, str) or kind not in kinds:
        raise ModelStoreError(
            f"{source}: attribute '{MODEL_ATTRIBUTE}/kind' is {kind!r}; known kinds: "
            f"{', '.join(sorted(kinds))}"
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
    for child in sorted(source.iterdir()):
        if child.is_dir() and not (child / "zarr.json").is_file():
            raise ModelStoreError(
                f"{source}: '{child.name}' has no zarr.json (the array's metadata); the store "
                "is incomplete, re-run calibration"
            )
    try:
        geometry = Geometry(float(info["depth_step_um"]), float(info["pixel_size_um"]),
                            float(info.get("depth_start_um", 0.0)))
        root = zarr.open_group(zarr.storage.LocalStore(source), mode="r", zarr_format=3)
        stored = dict(root.arrays())
        declared = sum(int(arr.nbytes) for arr in stored.values())
        if declared > physical_memory_bytes():
            raise ModelStoreError(
                f"{source}: its arrays declare {declared} bytes, more than this machine's "
                "memory; the store's metadata is damaged, re-run calibration"
            )
        arrays = {key: np.asarray(arr[...]) for key, arr in stored.items()}
        for key, array in arrays.items():
            if array.size and array.dtype.kind in "uif" and not np.any(array):
                raise ModelStoreError(
                    f"{source}: array '{key}' is all zero, so the model would turn every "
                    "volume into a black frame; re-run calibration with a bead scan that "
                    "shows the bead"
                )
        model = kinds[kind].from_store(arrays, parameters, geometry,
                                       info.get("dtype", "float32"))
    except ModelStoreError:
        raise
    except KeyError as exc:
        raise ModelStoreError(
            f"{source}: model store lacks {exc.args[0]!r}; the store is incomplete, "
            "re-run calibration"
        ) from exc
    except (ValueError, TypeError, OSError, RuntimeError, IndexError, AttributeError,
            ArithmeticError) as exc:
        # zarr raises ValueError/TypeError on damaged metadata and codec errors
        # (RuntimeError) on damaged chunks; the model's own checks raise ValueError subclasses.
        raise ModelStoreError(
            f"{source}: cannot read model store ({exc}); re-run calibration") from exc
    model._seed_norm(norm)
    return model
