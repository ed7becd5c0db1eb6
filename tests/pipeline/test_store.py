"""The job store's metadata checks: "not a volrecon store" and "damaged" are told apart."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import zarr

from volrecon.errors import InputFileError
from volrecon.pipeline import JobStore, store_status
from volrecon.pipeline.store import creation_interrupted, is_job_store

SHAPE_ZYX = (2, 6, 5)
N_FRAMES = 3


def _store(path: Path) -> Path:
    JobStore.create(path, shape_zyx=SHAPE_ZYX, n_frames=N_FRAMES,
                    scale_tzyx=(0.5, 2.0, 0.65, 0.65),
                    metadata={"video": {"n_frames": N_FRAMES}})
    return path


def _edit_attribute(path: Path, **changes: object) -> None:
    meta = path / "zarr.json"
    document = json.loads(meta.read_text())
    document["attributes"]["volrecon"].update(changes)
    meta.write_text(json.dumps(document))


def test_a_created_store_is_recognised_and_opens(tmp_path):
    path = _store(tmp_path / "out.zarr")
    assert is_job_store(path) and not creation_interrupted(path)
    assert JobStore.open(path, mode="r").n_frames == N_FRAMES


@pytest.mark.parametrize("what", ["plain group", "empty folder", "missing", "array"])
def test_other_folders_are_not_job_stores(tmp_path, what):
    path = tmp_path / "other"
    if what == "plain group":
        zarr.open_group(zarr.storage.LocalStore(path), mode="w", zarr_format=3,
                        attributes={"something": 1})
    elif what == "empty folder":
        path.mkdir()
    elif what == "array":
        path = _store(tmp_path / "out.zarr") / "0"
    assert not is_job_store(path) and not creation_interrupted(path)
    with pytest.raises(InputFileError, match="not a volrecon output store"):
        JobStore.open(path)


@pytest.mark.parametrize("damage", ["truncated", "a JSON list", "unknown key"])
def test_damaged_metadata_is_reported_as_damage(tmp_path, damage):
    path = _store(tmp_path / "out.zarr")
    meta = path / "zarr.json"
    text = meta.read_text()
    if damage == "truncated":
        meta.write_text(text[: len(text) // 2])
    elif damage == "a JSON list":
        meta.write_text("[]")
    else:
        meta.write_text(json.dumps({**json.loads(text), "shape": [3]}))
    # Nothing shows the folder is a job's store any more, so it is never deleted or reused...
    assert not is_job_store(path) and not creation_interrupted(path)
    # ...and opening it says what is wrong, with the two ways out.
    with pytest.raises(InputFileError, match=r"metadata \(zarr\.json\) is damaged .*--restart"):
        JobStore.open(path)


def test_interrupted_creation_is_recognised_and_counted(tmp_path):
    path = _store(tmp_path / "out.zarr")
    _edit_attribute(path, state="creating")
    assert creation_interrupted(path)
    with pytest.raises(InputFileError, match="creation was interrupted"):
        JobStore.open(path)
    status = store_status(path)
    # Known truth: the frames the store was being made for, none of them done.
    assert (status.total, status.done, status.state) == (N_FRAMES, 0, "stopped")


def test_store_of_another_format_is_refused(tmp_path):
    path = _store(tmp_path / "out.zarr")
    _edit_attribute(path, format_version=4)
    with pytest.raises(InputFileError, match=r"output store format 4 is not one this volrecon "
                                             r"reads \(1, 2, 3\)"):
        JobStore.open(path)


def test_attribute_that_is_not_a_table_is_refused(tmp_path):
    path = _store(tmp_path / "out.zarr")
    meta = path / "zarr.json"
    document = json.loads(meta.read_text())
    document["attributes"]["volrecon"] = "ready"
    meta.write_text(json.dumps(document))
    with pytest.raises(InputFileError, match="attribute 'volrecon' is not a table"):
        JobStore.open(path)


def test_status_of_a_folder_that_is_no_store(tmp_path):
    with pytest.raises(InputFileError, match="not a volrecon output store"):
        store_status(tmp_path)
