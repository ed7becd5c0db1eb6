"""parse_ome_image reads OME-NGFF 0.5 image metadata as the specification defines it.

The reference is the ome-zarr-models package (the OME-NGFF 0.5 specification as pydantic
models): it builds spec-valid metadata independently of volrecon's writer, and it decides
which of the damaged variants below the specification rejects.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

import numpy as np
import pydantic
import pytest
from ome_zarr_models.v05.axes import Axis
from ome_zarr_models.v05.image import Image, ImageAttrs
from pydantic_zarr.v3 import ArraySpec

from volrecon.errors import InputFileError
from volrecon.io import OmeImage, OmeLevel, ome_image_attributes, parse_ome_image


@pytest.mark.parametrize("translation_tzyx", [None, (0.0, -4.5, 1.25, 0.0)])
@pytest.mark.parametrize("scale_tzyx", [(0.5, 2.0, 0.65, 0.65), (1.0, 1.0, 1.0, 1.0)])
def test_reads_back_what_the_writer_wrote(scale_tzyx, translation_tzyx):
    ome = ome_image_attributes(scale_tzyx=scale_tzyx, name="volumes",
                               translation_tzyx=translation_tzyx)
    ImageAttrs.model_validate(ome)  # the writer's output is spec-valid (the reference)
    image = parse_ome_image({"ome": ome, "volrecon": {}}, source="v.zarr")
    # Reference: the values handed to the writer.
    assert image == OmeImage(
        name="volumes", axis_names=("t", "z", "y", "x"),
        axis_types=("time", "space", "space", "space"),
        axis_units=("second", "micrometer", "micrometer", "micrometer"),
        levels=(OmeLevel(path="0", scale=scale_tzyx,
                         translation=translation_tzyx or (0.0, 0.0, 0.0, 0.0)),))


def _pyramid(*, global_transform: bool) -> Image:
    """A 3-level (t, c, z, y, x) image built by ome-zarr-models, not by volrecon."""
    axes = [Axis(name="t", type="time", unit="millisecond"), Axis(name="c", type="channel"),
            *(Axis(name=n, type="space", unit="micrometer") for n in "zyx")]
    shapes = [(4, 2, 8, 32, 32), (4, 2, 4, 16, 16), (4, 2, 2, 8, 8)]
    specs = [ArraySpec.from_array(np.zeros(shape, "float32"),
                                  dimension_names=["t", "c", "z", "y", "x"])
             for shape in shapes]
    return Image.new(
        array_specs=specs, paths=["0", "1", "2"], axes=axes,
        scales=[[1.0, 1.0, 0.5, 0.25, 0.25], [1.0, 1.0, 1.0, 0.5, 0.5],
                [1.0, 1.0, 2.0, 1.0, 1.0]],
        translations=[None, [0.0, 0.0, 0.25, 0.125, 0.125], [0.0, 0.0, 0.75, 0.375, 0.375]],
        name="pyramid",
        global_scale=[0.1, 1.0, 1.0, 1.0, 1.0] if global_transform else None,
        global_translation=[0.0, 0.0, 10.0, -3.0, 2.5] if global_transform else None,
    )


def _world(scale: Any, translation: Any, index: Any) -> np.ndarray:
    return np.asarray(scale, float) * np.asarray(index, float) + np.asarray(translation, float)


@pytest.mark.parametrize("global_transform", [False, True])
def test_reads_a_spec_valid_pyramid_built_by_ome_zarr_models(global_transform):
    model = _pyramid(global_transform=global_transform)
    attributes = model.attributes.model_dump(mode="json")  # the JSON a group would hold
    image = parse_ome_image(attributes, source="pyramid.zarr")
    multiscale = model.attributes.ome.multiscales[0]
    assert image.name == "pyramid"
    assert image.axis_names == tuple(a.name for a in multiscale.axes)
    assert image.axis_types == ("time", "channel", "space", "space", "space")
    assert image.axis_units == ("millisecond", None, "micrometer", "micrometer", "micrometer")
    assert [level.path for level in image.levels] == [d.path for d in multiscale.datasets]
    # Reference: the specification's order of transforms, applied one after the other to a
    # voxel index with numpy: the level's scale, its translation, then the multiscale's.
    index = np.array([3, 1, 2, 5, 7])
    shared = multiscale.coordinateTransformations or ()
    for level, dataset in zip(image.levels, multiscale.datasets, strict=True):
        expected = index.astype(float)
        for transform in (*dataset.coordinateTransformations, *shared):
            if transform.type == "scale":
                expected = expected * np.asarray(transform.scale)
            else:
                expected = expected + np.asarray(transform.translation)
        # Sums and products of a few binary fractions: exact in float64.
        np.testing.assert_array_equal(_world(level.scale, level.translation, index), expected)


def _base() -> dict[str, Any]:
    return ome_image_attributes(scale_tzyx=(0.5, 2.0, 0.65, 0.65), name="volumes",
                                translation_tzyx=(0.0, 3.0, 0.0, 0.0))


def _dataset(ome: dict[str, Any]) -> dict[str, Any]:
    dataset: dict[str, Any] = ome["multiscales"][0]["datasets"][0]
    return dataset


#: Damaged metadata the specification rejects (ome-zarr-models raises), and the part of
#: volrecon's message naming what is wrong.
REJECTED: dict[str, tuple[Callable[[dict[str, Any]], object], str]] = {
    "version 0.4": (lambda o: o.update(version="0.4"), r"'ome/version' is '0\.4'"),
    "no multiscales": (lambda o: o.pop("multiscales"), "'ome/multiscales' is missing"),
    "empty multiscales": (lambda o: o.update(multiscales=[]), "'ome/multiscales' is missing"),
    "no axes": (lambda o: o["multiscales"][0].pop("axes"), "'ome/multiscales/0/axes'"),
    "repeated axis name": (lambda o: o["multiscales"][0]["axes"][1].update(name="t"),
                           "distinct names"),
    "no datasets": (lambda o: o["multiscales"][0].update(datasets=[]), "datasets' is missing"),
    "dataset without path": (lambda o: _dataset(o).pop("path"), "needs a 'path'"),
    "no transforms": (lambda o: _dataset(o).pop("coordinateTransformations"),
                      "needs one scale"),
    "scale too short": (lambda o: _dataset(o)["coordinateTransformations"][0].update(
        scale=[1.0, 1.0]), "needs one scale"),
    "scale not numbers": (lambda o: _dataset(o)["coordinateTransformations"][0].update(
        scale=[1.0, "a", 1.0, 1.0]), "needs one scale"),
    "two scales": (lambda o: _dataset(o)["coordinateTransformations"].append(
        {"type": "scale", "scale": [1.0] * 4}), "needs one scale"),
    "translation only": (lambda o: _dataset(o).update(coordinateTransformations=[
        {"type": "translation", "translation": [0.0] * 4}]), "needs one scale"),
    "identity": (lambda o: _dataset(o).update(coordinateTransformations=[
        {"type": "identity"}]), "needs one scale"),
    "translation too long": (lambda o: _dataset(o)["coordinateTransformations"][1].update(
        translation=[0.0] * 5), "needs one scale"),
    "shared scale too short": (lambda o: o["multiscales"][0].update(coordinateTransformations=[
        {"type": "scale", "scale": [1.0]}]), r"'ome/multiscales/0/coordinateTransformations'"),
}


@pytest.mark.parametrize("damage", sorted(REJECTED))
def test_refuses_what_the_specification_rejects(damage):
    edit, match = REJECTED[damage]
    ome = _base()
    edit(ome)
    with pytest.raises(pydantic.ValidationError):
        ImageAttrs.model_validate(ome)  # the reference rejects it
    with pytest.raises(InputFileError, match=match) as caught:
        parse_ome_image({"ome": ome}, source="bad.zarr")
    message = str(caught.value)
    assert message.startswith("bad.zarr: ") and "\n" not in message
    assert "write the image again" in message or "write it again" in message


def test_refuses_translation_before_scale():
    # The specification: "translation ... MUST come after scale". ome-zarr-models repairs
    # that order with a warning instead; this reader refuses it rather than guess.
    ome = _base()
    _dataset(ome)["coordinateTransformations"].reverse()
    with pytest.raises(InputFileError, match="needs one scale, then at most one translation"):
        parse_ome_image({"ome": ome}, source="bad.zarr")


@pytest.mark.parametrize("value", [float("nan"), float("inf"), True])
def test_refuses_scale_values_that_place_no_voxel(value):
    # Known truth: a NaN or infinite voxel size puts voxels nowhere, and true is not a number
    # (ome-zarr-models accepts all three by coercion, so it is no reference here).
    ome = _base()
    _dataset(ome)["coordinateTransformations"][0]["scale"][1] = value
    with pytest.raises(InputFileError, match="finite number per axis"):
        parse_ome_image({"ome": ome}, source="bad.zarr")


@pytest.mark.parametrize("attributes", [{}, {"ome": [1]}, {"volrecon": {}}])
def test_refuses_groups_without_ome_metadata(attributes):
    with pytest.raises(InputFileError, match="no OME-NGFF metadata"):
        parse_ome_image(attributes, source="plain.zarr")


def test_input_is_not_modified():
    ome = _base()
    before = copy.deepcopy(ome)
    parse_ome_image({"ome": ome}, source="v.zarr")
    assert ome == before
