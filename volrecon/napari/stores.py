"""Turn volrecon stores into napari layer data, lazily (no napari or Qt needed).

Two kinds of store open in the viewer:

- an **output store** of a job (``volumes.zarr``): the ``(t, z, y, x)`` image as one dask array
  with the physical scale, translation, units and axis names of its OME-NGFF 0.5 metadata,
  plus its maximum projections (when the job wrote them) as extra, hidden layers;
- a **PSF model store**: the PSF stack as a ``(z, y, x)`` image, and for a depth low-rank model
  also its lateral kernels; a lenslet-array model as its ``N × N`` sub-position responses.

Each function returns napari "layer data tuples" ``(data, kwargs, "image")``. Pixels are read
only when napari displays them, except one frame per output store (see
:func:`output_store_layers`) to choose the contrast limits.
"""

from __future__ import annotations

import os
import uuid
from pathlib import Path
from typing import Any, Literal

import numpy as np

from volrecon.errors import InputFileError, ModelStoreError
from volrecon.io.ome_zarr import parse_ome_image
from volrecon.io.zarr_groups import group_attributes
from volrecon.models.store import MODEL_ATTRIBUTE, open_model_store
from volrecon.pipeline.store import STATUS_DONE, STORE_ATTRIBUTE

__all__ = [
    "LayerData",
    "model_store_layers",
    "model_throughput",
    "output_store_layers",
    "store_kind",
    "store_layers",
]

#: napari's (data, kwargs, layer type) triple.
LayerData = tuple[Any, dict[str, Any], str]
#: Colour map of reconstructed volumes (perceptually uniform, dark background).
VOLUME_COLORMAP = "magma"
_OUTPUT_ATTRIBUTE = STORE_ATTRIBUTE
_MODEL_ATTRIBUTE = MODEL_ATTRIBUTE


def store_kind(path: str | os.PathLike[str]) -> Literal["output", "model"] | None:
    """Which volrecon store `path` is: ``"output"``, ``"model"`` or None (not ours).

    Reads one small metadata file; never raises (a damaged one gives None).
    """
    try:
        attributes = group_attributes(Path(path))
    except InputFileError:
        return None
    if attributes is None:
        return None
    if _OUTPUT_ATTRIBUTE in attributes:
        return "output"
    if _MODEL_ATTRIBUTE in attributes:
        return "model"
    return None


def store_layers(path: str | os.PathLike[str]) -> list[LayerData]:
    """Layers of any volrecon store (output or PSF model).

    Raises
    ------
    InputFileError
        If `path` is neither kind of store.
    """
    kind = store_kind(path)
    if kind == "output":
        return output_store_layers(path)
    if kind == "model":
        return model_store_layers(path)
    raise InputFileError(
        f"{path}: not a volrecon output store or PSF model store (no 'volrecon' or "
        "'volrecon_model' attribute in zarr.json); give a job's [output] path or a model store"
    )


def _lazy(array: Any, name: str | None = None) -> Any:
    """A zarr array as a dask array with one dask chunk per zarr chunk."""
    import dask.array as da

    return da.from_zarr(array, name=name)  # type: ignore[no-untyped-call]


# ------------------------------------------------------------------------------ output store
def _open_group(path: Path) -> Any:
    import zarr

    return zarr.open_group(zarr.storage.LocalStore(path, read_only=True), mode="r")


def _frame_for_contrast(status: np.ndarray | None) -> int | None:
    """Index of a finished frame to read for the contrast limits (the middle one), or None."""
    if status is None:
        return None
    done = np.flatnonzero(status == STATUS_DONE)
    return int(done[len(done) // 2]) if done.size else None


def _contrast_limits(group: Any, image: Any, frame: int | None) -> tuple[float, float]:
    """(0, max) of one finished frame: its projection if the job wrote one, else the frame."""
    if frame is None:
        return (0.0, 1.0)
    projections = group.get("projections")
    if projections is not None and "max_z" in projections:
        sample = np.asarray(projections["max_z"][frame])
    else:
        sample = np.asarray(image[frame])
    finite = sample[np.isfinite(sample)]
    if finite.size == 0:
        return (0.0, 1.0)
    low, high = min(0.0, float(finite.min())), float(finite.max())
    return (low, high) if high > low else (low, low + 1.0)


def output_store_layers(path: str | os.PathLike[str]) -> list[LayerData]:
    """The image of a job's output store as a lazy 4-D layer, its projections as extra ones.

    Parameters
    ----------
    path : str or path
        A store written by ``volrecon run`` (complete or still being written).

    Returns
    -------
    list of (data, kwargs, "image")
        First the volumes: a dask array ``(T, Z, Y, X)`` (a list of them, highest resolution
        first, with ``multiscale=True`` when the store has levels), one dask chunk per zarr
        chunk, with ``scale`` (frame interval in seconds, voxel size in micrometres),
        ``translate``, ``axis_labels``, ``units`` and ``contrast_limits``. Then, when the store
        has them, the projections ``max_z`` ``(T, 1, Y, X)``, ``max_y`` ``(T, Z, 1, X)`` and
        ``max_x`` ``(T, Z, Y, 1)``, hidden, with the projected axis stretched over the whole
        volume so they sit where the volume is.

    Raises
    ------
    InputFileError
        If `path` is not an output store, its ``zarr.json`` is damaged, or its OME metadata
        is malformed.

    Notes
    -----
    Frames not yet reconstructed read as NaN (the store's fill value) and show as empty.
    The contrast limits are ``(0, max)`` of one finished frame (its ``max_z`` projection
    when present, which is much smaller), so opening reads at most one frame's chunks.
    """

    path = Path(path)
    attributes = group_attributes(path)
    if attributes is None or _OUTPUT_ATTRIBUTE not in attributes:
        raise InputFileError(
            f"{path}: not a volrecon output store (no '{_OUTPUT_ATTRIBUTE}' attribute in "
            "zarr.json); give the [output] path of a job"
        )
    ome = parse_ome_image(attributes, source=path)
    level = ome.levels[0].path
    names = list(ome.axis_names)
    units = [unit or "" for unit in ome.axis_units]
    scale, translation = list(ome.levels[0].scale), list(ome.levels[0].translation)
    name = ome.name or path.stem
    group = _open_group(path)
    try:
        image = group[level]
    except KeyError as exc:
        raise InputFileError(
            f"{path}: image array '{level}' is missing; the job was interrupted while creating "
            "the store, run it again"
        ) from exc
    if image.ndim != len(names):
        raise InputFileError(
            f"{path}: array '{level}' has {image.ndim} axes but 'ome/multiscales' names "
            f"{len(names)} ({', '.join(names)}); re-run the job with --restart"
        )
    diagnostics = group.get("diagnostics")
    status = None
    if diagnostics is not None and "status" in diagnostics:
        status = np.asarray(diagnostics["status"][...])
    frame = _frame_for_contrast(status)
    # A new dask name on every read: napari's chunk cache then never serves a chunk read
    # before a running job wrote it.
    opened = uuid.uuid4().hex
    volumes: Any = _lazy(image, f"volrecon-volumes-{opened}")
    if len(ome.levels) > 1:  # napari draws the level that fits the screen
        volumes = [volumes, *(_lazy(_level_array(path, group, level.path, image.ndim),
                                    f"volrecon-volumes-{level.path}-{opened}")
                              for level in ome.levels[1:])]
    metadata = {
        "volrecon_store": os.fspath(path.resolve()),
        "volrecon_kind": "output",
        "volrecon": attributes.get(_OUTPUT_ATTRIBUTE, {}),
    }
    layers: list[LayerData] = [(volumes, {
        "name": path.stem if name == "volumes" else name,
        "scale": scale,
        "translate": translation,
        "axis_labels": names,
        "units": units,
        "contrast_limits": _contrast_limits(group, image, frame),
        "colormap": VOLUME_COLORMAP,
        "blending": "additive",
        "multiscale": len(ome.levels) > 1,
        "metadata": metadata,
    }, "image")]
    layers.extend(_projection_layers(path, group, names, units, scale, translation,
                                     tuple(image.shape), layers[0][1]["contrast_limits"],
                                     opened))
    return layers


def _level_array(path: Path, group: Any, level: str, ndim: int) -> Any:
    """A lower resolution level of the image (same axes as level 0)."""
    try:
        array = group[level]
    except KeyError as exc:
        raise InputFileError(
            f"{path}: resolution level '{level}' named in 'ome/multiscales' is missing; "
            "re-run the job with --restart"
        ) from exc
    if array.ndim != ndim:
        raise InputFileError(f"{path}: level '{level}' has {array.ndim} axes, level 0 {ndim}; "
                             "re-run the job with --restart")
    return array


def _projection_layers(path: Path, group: Any, names: list[str], units: list[str],
                       scale: list[float], translation: list[float], shape: tuple[int, ...],
                       limits: tuple[float, float], opened: str) -> list[LayerData]:
    """Hidden 4-D layers of the ``projections`` group, each with a singleton projected axis."""
    import dask.array as da

    projections = group.get("projections")
    if projections is None or names != ["t", "z", "y", "x"]:
        return []
    layers: list[LayerData] = []
    for key in ("max_z", "max_y", "max_x"):
        if key not in projections:
            continue
        axis = names.index(key[-1])
        array = projections[key]
        expected = shape[:axis] + shape[axis + 1:]
        if tuple(array.shape) != expected:
            raise InputFileError(
                f"{path}: projection 'projections/{key}' has shape {tuple(array.shape)}, "
                f"expected {expected} from the image; re-run the job with --restart"
            )
        # One plane covering the whole projected extent: centre it on the volume.
        layer_scale = list(scale)
        layer_translate = list(translation)
        layer_scale[axis] = scale[axis] * shape[axis]
        layer_translate[axis] = translation[axis] + scale[axis] * (shape[axis] - 1) / 2
        data = _lazy(array, f"volrecon-{key}-{opened}")
        layers.append((da.expand_dims(data, axis), {
            "name": f"{path.stem} {key}",
            "scale": layer_scale,
            "translate": layer_translate,
            "axis_labels": names,
            "units": units,
            "contrast_limits": limits,
            "colormap": VOLUME_COLORMAP,
            "blending": "additive",
            "visible": False,
            "metadata": {"volrecon_store": os.fspath(path.resolve()),
                         "volrecon_kind": f"projection/{key}"},
        }, "image"))
    return layers


# ------------------------------------------------------------------------------- model store
def _expand_low_rank(weights_zr: Any, kernels_ryx: Any) -> Any:
    """Lazy ``h_z = Σ_r U[z, r] g_r``, one dask chunk per depth plane."""
    import dask.array as da

    weights = weights_zr.rechunk({0: 1, 1: -1})
    return da.tensordot(weights, kernels_ryx.rechunk({0: -1}), axes=(1, 0)).astype(np.float32)


def model_throughput(parameters: dict[str, Any], *, depth_start_um: float = 0.0,
                     depth_step_um: float = 1.0) -> tuple[np.ndarray | None, str]:
    """The relative throughput per plane a model store records, and one line about it.

    Calibration stores the light of each plane relative to the brightest plane of all
    (``volrecon_model/parameters/calibration/throughput``, shape ``(K, Z)``: one row per
    field position or lenslet sub-position).

    Parameters
    ----------
    parameters : dict
        The store's ``volrecon_model/parameters`` (:attr:`StoredModel.parameters`).
    depth_start_um, depth_step_um : float
        Depth of plane 0 and the step, micrometres (to name the dimmest plane's depth).

    Returns
    -------
    throughput : ndarray of shape (Z,) or None
        Per plane, the lowest over the rows (None when the store records none, or not as
        numbers, e.g. a model made with ``PSFModel.from_stack``).
    summary : str
        One line, e.g. ``"relative throughput per plane 0.41-1.00, dimmest plane 7 (14 um)"``.
    """
    calibration = parameters.get("calibration")
    values = calibration.get("throughput") if isinstance(calibration, dict) else None
    try:
        table = np.atleast_2d(np.asarray(values, dtype=np.float64))
    except (TypeError, ValueError):
        table = np.empty((0, 0))
    if values is None or table.ndim != 2 or table.size == 0 or not np.isfinite(table).any():
        return None, ("relative throughput per plane: not recorded in this model (models from "
                      "'volrecon calibrate' record it)")
    with np.errstate(invalid="ignore"):
        per_plane = np.nanmin(np.where(np.isfinite(table), table, np.nan), axis=0)
    dimmest = int(np.nanargmin(per_plane))
    rows = f" (lowest of {table.shape[0]} PSFs)" if table.shape[0] > 1 else ""
    summary = (f"relative throughput per plane{rows} {np.nanmin(per_plane):.2f}-"
               f"{np.nanmax(per_plane):.2f}, dimmest plane {dimmest} "
               f"({depth_start_um + depth_step_um * dimmest:g} um): "
               + " ".join(f"{v:.2f}" for v in per_plane))
    return per_plane, summary


def model_store_layers(path: str | os.PathLike[str]) -> list[LayerData]:
    """A PSF model store as a lazy ``(z, y, x)`` PSF image (and kernels where it has them).

    Parameters
    ----------
    path : str or path
        A store written by ``PSFModel.save`` or ``volrecon calibrate``.

    Returns
    -------
    list of (data, kwargs, "image")
        - depth-convolution: the PSF stack ``(Z, Y, X)``;
        - depth-low-rank: the stack the model applies, ``h_z = Σ_r U[z, r] g_r``, computed one
          plane at a time when displayed, and the kernels ``(r, Y, X)`` (hidden);
        - field-varying: the kernels ``(K, Z, Y, X)``, one PSF stack per field position;
        - lenslet: the responses ``(N, N, Z, Y, X)``, one PSF stack per sub-position of a
          lenslet (sliders for the sub-position's y and x).
        Depth is scaled by the model's depth step and starts at its first depth; y and x by
        its pixel size (micrometres). Where the store records the relative throughput per
        plane (:func:`model_throughput`), the layer names end in its range, e.g.
        ``"(throughput 0.41-1.00)"``, and the metadata holds it per plane
        (``"volrecon_throughput"``) with a one-line summary
        (``"volrecon_throughput_summary"``).

    Raises
    ------
    ModelStoreError
        If `path` is not a model store (see :func:`volrecon.models.open_model_store`), is of a
        kind this viewer cannot show, or lacks an array its kind needs.
    """
    import dask.array as da

    stored = open_model_store(path)
    stem, array = stored.path.stem, stored.lazy_array
    depth_step, pixel = stored.geometry.depth_step_um, stored.geometry.pixel_size_um
    depth_start = stored.geometry.depth_start_um
    space = ["micrometer"] * 3
    zyx = {"scale": [depth_step, pixel, pixel], "translate": [depth_start, 0.0, 0.0],
           "axis_labels": ["z", "y", "x"], "units": space}
    throughput, summary = model_throughput(stored.parameters, depth_start_um=depth_start,
                                           depth_step_um=depth_step)
    metadata = {"volrecon_store": os.fspath(stored.path.resolve()), "volrecon_kind": "model",
                "volrecon_model": stored.attributes,
                "volrecon_throughput": None if throughput is None else throughput.tolist(),
                "volrecon_throughput_summary": summary}
    common = {"colormap": "inferno", "metadata": metadata}
    # The layer list shows the name: the throughput range goes there, the rest in metadata.
    suffix = "" if throughput is None else (
        f" (throughput {np.nanmin(throughput):.2f}-{np.nanmax(throughput):.2f})")
    if stored.kind == "depth-convolution":
        return [(array("psf"), {"name": f"{stem} PSF{suffix}", **zyx, **common}, "image")]
    if stored.kind == "depth-low-rank":
        kernels, weights = array("kernels"), array("weights")
        stack = _expand_low_rank(weights, kernels)
        return [
            (stack, {"name": f"{stem} PSF{suffix}", **zyx, **common}, "image"),
            (kernels, {"name": f"{stem} kernels", "scale": [1.0, pixel, pixel],
                       "axis_labels": ["kernel", "y", "x"],
                       "units": ["dimensionless", *space[1:]],
                       "visible": False, **common}, "image"),
        ]
    if stored.kind == "field-varying":
        kernels = array("kernels")  # (Z, K, Y, X)
        return [(da.moveaxis(kernels, 1, 0), {
            "name": f"{stem} PSF per field position{suffix}",
            "scale": [1.0, depth_step, pixel, pixel],
            "translate": [0.0, depth_start, 0.0, 0.0],
            "axis_labels": ["field position", "z", "y", "x"], "units": ["dimensionless", *space],
            **common}, "image")]
    if stored.kind == "lenslet":
        responses = da.moveaxis(array("psf"), 0, 2)  # (Z, N, N, Y, X) → (N, N, Z, Y, X)
        return [(responses, {
            "name": f"{stem} PSF per sub-position{suffix}",
            "scale": [1.0, 1.0, depth_step, pixel, pixel],
            "translate": [0.0, 0.0, depth_start, 0.0, 0.0],
            "axis_labels": ["sub-position y", "sub-position x", "z", "y", "x"],
            "units": ["dimensionless", "dimensionless", *space], **common}, "image")]
    raise ModelStoreError(
        f"{stored.path}: attribute '{_MODEL_ATTRIBUTE}/kind' is {stored.kind!r}, which this "
        "viewer cannot show; known kinds: depth-convolution, depth-low-rank, field-varying, "
        "lenslet"
    )
