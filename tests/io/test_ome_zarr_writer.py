"""The OME-Zarr writer's output passes the OME-NGFF 0.5 validator and ome-zarr's reader."""

from __future__ import annotations

import numpy as np
import pytest
import zarr
from ome_zarr.io import parse_url
from ome_zarr.reader import Reader
from ome_zarr_models.v05 import Image

from volrecon.errors import ConfigError
from volrecon.io import create_ome_image, ome_image_attributes, volume_chunks


@pytest.mark.parametrize("translation", [None, (0.0, -4.0, 0.0, 0.0)])
def test_store_is_valid_ome_ngff_05_and_reads_back(tmp_path, rng, translation):
    data = rng.random((3, 2, 9, 8), dtype=np.float32)
    path = tmp_path / "img.zarr"
    group = create_ome_image(path, shape_tzyx=data.shape, scale_tzyx=(0.5, 2.0, 0.65, 0.65),
                             translation_tzyx=translation, attributes={"mine": 1})
    group["0"][:] = data
    # Published standard: OME-NGFF 0.5, checked by the ome-zarr-models validator.
    image = Image.from_zarr(zarr.open_group(path, mode="r"))
    multiscale = image.attributes.ome.multiscales[0]
    assert [a.name for a in multiscale.axes] == ["t", "z", "y", "x"]
    assert [a.unit for a in multiscale.axes] == ["second"] + ["micrometer"] * 3
    assert multiscale.datasets[0].coordinateTransformations[0].scale == [0.5, 2.0, 0.65, 0.65]
    # Independent reader: ome-zarr-py.
    node = next(iter(Reader(parse_url(str(path)))()))
    np.testing.assert_array_equal(np.asarray(node.data[0]), data)
    meta = zarr.open_array(path, path="0", mode="r").metadata
    assert list(meta.dimension_names) == ["t", "z", "y", "x"]
    assert zarr.open_group(path, mode="r").attrs["mine"] == 1


def test_unwritten_frames_read_nan(tmp_path):
    group = create_ome_image(tmp_path / "i.zarr", shape_tzyx=(2, 1, 4, 4),
                             scale_tzyx=(1, 1, 1, 1))
    group["0"][1] = np.zeros((1, 4, 4), np.float32)
    assert np.isnan(group["0"][0]).all() and not np.isnan(group["0"][1]).any()


def test_chunks_hold_one_frame_and_stay_small():
    assert volume_chunks((8, 16, 16)) == (1, 8, 16, 16)
    # 2048 x 2048 float32 planes are 16 MiB each: one plane per chunk.
    assert volume_chunks((10, 2048, 2048)) == (1, 1, 2048, 2048)


def test_bad_scale_refused():
    with pytest.raises(ConfigError, match="positive"):
        ome_image_attributes(scale_tzyx=(0.0, 1, 1, 1), name="x")
