"""group_attributes: None for what is not a zarr v3 group, InputFileError for damaged metadata."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import zarr

from volrecon.errors import InputFileError
from volrecon.io import group_attributes

#: A group's zarr.json as zarr 3 writes it, with attributes of several JSON types.
ATTRIBUTES = {"volrecon": {"state": "ready", "frames": [0, 4, 9]}, "name": "bead ø 0.2 µm",
              "nested": {"a": {"b": [1.5, None, True]}}}


def _write_group(path: Path) -> Path:
    zarr.open_group(zarr.storage.LocalStore(path), mode="w", zarr_format=3,
                    attributes=ATTRIBUTES)
    return path


def _folder_with_metadata(path: Path, content: bytes) -> Path:
    path.mkdir()
    (path / "zarr.json").write_bytes(content)
    return path


def test_attributes_of_a_group_written_by_zarr(tmp_path):
    store = _write_group(tmp_path / "g.zarr")
    # Reference: the attributes handed to zarr when the group was created.
    assert group_attributes(store) == ATTRIBUTES
    assert group_attributes(str(store)) == ATTRIBUTES


def test_result_is_a_copy(tmp_path):
    store = _write_group(tmp_path / "g.zarr")
    attributes = group_attributes(store)
    assert attributes is not None
    attributes["volrecon"] = "changed"
    assert group_attributes(store) == ATTRIBUTES


def test_nan_attribute_reads_back(tmp_path):
    # zarr writes non-finite floats as the JSON extension NaN; json and zarr read it back.
    store = _folder_with_metadata(
        tmp_path / "nan.zarr", b'{"zarr_format": 3, "node_type": "group", "attributes": '
                               b'{"x": NaN}}')
    attributes = group_attributes(store)
    assert attributes is not None and math.isnan(attributes["x"])


def _not_groups(tmp_path: Path) -> dict[str, Path]:
    (tmp_path / "frame.tif").write_bytes(b"II*\x00not really")
    (tmp_path / "empty").mkdir()
    zarr.open_group(str(tmp_path / "v2.zarr"), mode="w", zarr_format=2)
    zarr.create_array(zarr.storage.LocalStore(tmp_path / "array.zarr"), shape=(3,),
                      dtype="float32", zarr_format=3)
    (tmp_path / "odd.zarr" / "zarr.json").mkdir(parents=True)
    return {"missing": tmp_path / "missing.zarr", "file": tmp_path / "frame.tif",
            "empty folder": tmp_path / "empty", "zarr v2 group": tmp_path / "v2.zarr",
            "zarr v3 array": tmp_path / "array.zarr",
            "zarr.json is a folder": tmp_path / "odd.zarr"}


@pytest.mark.parametrize("what", ["missing", "file", "empty folder", "zarr v2 group",
                                  "zarr v3 array", "zarr.json is a folder"])
def test_what_is_not_a_zarr_v3_group_gives_none(tmp_path, what):
    assert group_attributes(_not_groups(tmp_path)[what]) is None


#: Damaged zarr.json files and the zarr or json error each one raised in the experiment the
#: function's exception list comes from (zarr 3.1).
GOOD = json.dumps({"zarr_format": 3, "node_type": "group", "attributes": ATTRIBUTES})
DAMAGED: dict[str, tuple[bytes, type[Exception]]] = {
    "truncated": (GOOD[:25].encode(), json.JSONDecodeError),
    "empty file": (b"", json.JSONDecodeError),
    "not UTF-8": (b"\xff\xfe\x00{", ValueError),
    "a JSON list": (b"[]", TypeError),
    "a JSON string": (b'"group"', AttributeError),
    "unknown key": (json.dumps({**json.loads(GOOD), "shape": [3]}).encode(), TypeError),
    "attributes not a table": (
        json.dumps({"zarr_format": 3, "node_type": "group", "attributes": [1]}).encode(),
        TypeError),
    "zarr_format as text": (json.dumps({"zarr_format": "3", "node_type": "group"}).encode(),
                            ValueError),
    "unknown node_type": (json.dumps({"zarr_format": 3, "node_type": "blob"}).encode(),
                          ValueError),
    "nested too deep": (b"[" * 100_000, RecursionError),
}


@pytest.mark.parametrize("damage", sorted(DAMAGED))
def test_damaged_metadata_is_an_input_file_error_naming_the_file(tmp_path, damage):
    content, cause = DAMAGED[damage]
    store = _folder_with_metadata(tmp_path / "g.zarr", content)
    with pytest.raises(InputFileError, match=r"g\.zarr/zarr\.json: not readable as zarr v3 "
                                             r"group metadata .*damaged") as caught:
        group_attributes(store)
    assert isinstance(caught.value.__cause__, cause)
    assert "\n" not in str(caught.value)


def test_damage_is_told_apart_from_absence(tmp_path):
    """The distinction callers rely on: None (not a store) versus an error (a damaged one)."""
    store = _write_group(tmp_path / "g.zarr")
    assert group_attributes(store) is not None
    meta = store / "zarr.json"
    meta.write_bytes(meta.read_bytes()[:-3])
    with pytest.raises(InputFileError):
        group_attributes(store)
    meta.unlink()
    assert group_attributes(store) is None


def test_arrays_of_a_group_are_not_groups(tmp_path):
    group = zarr.open_group(zarr.storage.LocalStore(tmp_path / "g.zarr"), mode="w",
                            zarr_format=3)
    group.create_array("psf", shape=(2, 3), dtype="float32")[...] = np.ones((2, 3))
    assert group_attributes(tmp_path / "g.zarr") == {}
    assert group_attributes(tmp_path / "g.zarr" / "psf") is None
