"""volrecon verify: checksummed chunks, damage found and sent back, repaired bit-identically."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import jsonschema
import numpy as np
import pytest
import zarr
from jobdata import N_FRAMES, assert_bit_identical, make_job_files, read_store_arrays

import volrecon
from volrecon.cli import main
from volrecon.errors import InputFileError, StoreLockedError
from volrecon.pipeline import StoreLock, load_job, run_job, store_status
from volrecon.pipeline.store import STATUS_DONE, STATUS_PENDING, JobStore
from volrecon.pipeline.verify import verify_store

#: chain_frames = 3 (the tiny job's): frame 4 lies in chain [3, 6).
DAMAGED_FRAME = 4


@pytest.fixture(scope="module")
def finished_once(tmp_path_factory):
    """The tiny job with projections, run to the end once for this module, one file per chunk
    (``shard_frames = 1``: each byte flip hits one frame; sharded stores: test_shards.py)."""
    folder = tmp_path_factory.mktemp("verify")
    files = make_job_files(folder, np.random.default_rng(20261203))
    run_job(load_job(files.write_job(output={"max_projections": True, "shard_frames": 1})))
    return folder


@pytest.fixture
def finished(finished_once, tmp_path):
    """A private copy of the finished job: its job file, its store and an untouched copy."""
    folder = tmp_path / "job"
    shutil.copytree(finished_once, folder)
    store, reference = folder / "out.zarr", folder / "reference.zarr"
    shutil.copytree(store, reference)
    return folder / "job.toml", store, reference


def _flip_byte(path: Path, offset: int = 12) -> None:
    data = bytearray(path.read_bytes())
    data[offset % len(data)] ^= 0x10
    path.write_bytes(bytes(data))


def _chunk_file(store: Path, array: str, t: int) -> Path:
    (chunk,) = (p for p in (store / array / "c" / str(t)).rglob("*") if p.is_file())
    return chunk


def test_every_array_carries_a_checksum_and_a_flipped_byte_fails_loudly(finished):
    _job, store, _reference = finished
    group = zarr.open_group(store, mode="r")
    arrays = ["0", "projections/max_z", "projections/max_y", "projections/max_x",
              *(f"diagnostics/{name}" for name in ("status", "iterations", "objective",
                                                   "residual", "converged", "seconds"))]
    for key in arrays:
        codecs = [codec["name"] for codec in
                  json.loads((store / key / "zarr.json").read_text())["codecs"]]
        assert codecs == ["bytes", "zstd", "crc32c"], key
    assert group.attrs["volrecon"]["format_version"] == 3
    assert group.attrs["volrecon"]["shard_frames"] == 1  # this module's layout
    _flip_byte(_chunk_file(store, "0", DAMAGED_FRAME))
    # zarr's crc32c codec compares the stored and the computed checksum while decoding.
    with pytest.raises(ValueError, match="checksum do not match"):
        group["0"][DAMAGED_FRAME]


@pytest.mark.parametrize(("array", "found"), [
    ("0", "volume chunk damaged"),
    ("projections/max_y", "projection max_y chunk damaged"),
])
def test_damaged_frame_chunk_is_found_marked_pending_and_repaired(finished, array, found,
                                                                  capsys):
    job, store, reference = finished
    _flip_byte(_chunk_file(store, array, DAMAGED_FRAME))
    capsys.readouterr()
    assert main(["verify", str(store), "--no-progress"]) == 1
    out, err = capsys.readouterr()
    assert out.splitlines() == [f"frame {DAMAGED_FRAME}: {found}"]
    assert "1 damaged frames marked pending" in err and len(err.splitlines()) == 1
    status = JobStore.open(store, mode="r").status()
    assert status[DAMAGED_FRAME] == STATUS_PENDING
    assert (np.delete(status, DAMAGED_FRAME) == STATUS_DONE).all()
    # status says when verify ran and what it found
    assert f"1 damaged (frames {DAMAGED_FRAME}), marked pending" in _status_lines(store)
    # Chains holding no damaged frame are not rewritten by the repair run.
    untouched = _chunk_file(store, "0", 0)
    before = untouched.stat().st_mtime_ns
    result = run_job(load_job(job))
    assert result.computed == 3 and result.done == N_FRAMES
    assert untouched.stat().st_mtime_ns == before
    assert_bit_identical(read_store_arrays(store), read_store_arrays(reference))
    assert verify_store(store).intact


def test_damaged_diagnostics_chunk_sends_its_frames_back(finished, capsys):
    job, store, reference = finished
    _flip_byte(store / "diagnostics" / "residual" / "c" / "0")
    assert main(["verify", str(store), "--no-progress"]) == 1
    out, _err = capsys.readouterr()
    # One diagnostics chunk holds all 12 frames of the tiny job.
    assert out.splitlines() == [f"frame {t}: diagnostics residual chunk damaged"
                                for t in range(N_FRAMES)]
    assert (JobStore.open(store, mode="r").status() == STATUS_PENDING).all()
    assert run_job(load_job(job)).computed == N_FRAMES
    assert_bit_identical(read_store_arrays(store), read_store_arrays(reference))
    assert main(["verify", str(store), "--no-progress"]) == 0


def test_damaged_status_chunk_is_repaired_by_verify_then_run(finished):
    job, store, reference = finished
    _flip_byte(store / "diagnostics" / "status" / "c" / "0")
    with pytest.raises(InputFileError, match="volrecon verify"):
        run_job(load_job(job))
    report = verify_store(store)
    assert sorted(report.damaged) == list(range(N_FRAMES))
    run_job(load_job(job))
    assert_bit_identical(read_store_arrays(store), read_store_arrays(reference))


def test_intact_store_and_frame_range(finished, capsys):
    _job, store, _reference = finished
    assert main(["verify", str(store), "--frames", "2:5", "--no-progress"]) == 0
    out, _err = capsys.readouterr()
    assert out.strip() == f"{store}: frames 2:5: 3 finished frames intact"
    record = zarr.open_group(store, mode="r").attrs["volrecon"]["last_verify"]
    assert record["frames"] == [2, 5] and record["checked"] == 3 and record["damaged"] == 0
    # The record follows the published schema.
    schema = json.loads((Path(volrecon.__file__).parent / "schemas" /
                         "output-store.schema.json").read_text())
    jsonschema.validate(dict(zarr.open_group(store, mode="r").attrs), schema,
                        cls=jsonschema.Draft202012Validator)
    assert "frames 2:5, 3 finished frames read: all intact" in _status_lines(store)
    # Damage outside the range is not looked at.
    _flip_byte(_chunk_file(store, "0", 9))
    assert verify_store(store, frames="2:5").intact
    assert sorted(verify_store(store, frames="8:").damaged) == [9]


def test_missing_chunk_of_a_done_frame_is_damage(finished):
    _job, store, _reference = finished
    _chunk_file(store, "projections/max_z", 7).unlink()
    assert verify_store(store).damaged == {7: ("projection max_z chunk missing",)}


def test_verify_refuses_other_stores_with_one_line(finished, capsys):
    # a PSF model store, a plain folder, a store whose zarr.json is damaged
    _job, store, _reference = finished
    folder = store.parent
    (folder / "plain").mkdir()
    (store / "zarr.json").write_text("{")
    for target, said in [("model", "not a volrecon output store"),
                         ("plain", "not a volrecon output store"),
                         ("out.zarr", "metadata (zarr.json) is damaged")]:
        capsys.readouterr()
        assert main(["verify", str(folder / target)]) == 2
        _out, err = capsys.readouterr()
        assert len(err.splitlines()) == 1 and said in err, err
        assert not (folder / f"{target}.lock").exists()


def test_verify_waits_for_a_live_run(finished):
    _job, store, _reference = finished
    with StoreLock(store), pytest.raises(StoreLockedError, match="another run"):
        verify_store(store)


def _status_lines(store: Path) -> str:
    from volrecon.pipeline import format_status

    return "\n".join(format_status(store_status(store)))


@pytest.mark.parametrize("shard_frames", [1, 3])
def test_frames_are_flushed_to_disk_before_their_record(job_files, monkeypatch, shard_frames):
    # Durability order (store.py): a task's volume and projection chunks and their folders
    # are fsynced before its diagnostics, and those before the status chunk that marks its
    # frames done. Recorded through the one fsync helper the store uses.
    import volrecon.pipeline.store as store_module

    store = job_files.folder / "out.zarr"
    status_chunk = store / "diagnostics" / "status" / "c" / "0"
    synced: list[Path] = []
    done_at: dict[int, set[int]] = {}  # index in `synced` of a status fsync -> frames done
    real = store_module._fsync

    def recording(path: Path) -> None:
        real(path)
        if path == status_chunk:
            status = zarr.open_array(store / "diagnostics" / "status", mode="r")[:]
            done_at[len(synced)] = set(np.flatnonzero(status == STATUS_DONE).tolist())
        synced.append(path)

    monkeypatch.setattr(store_module, "_fsync", recording)
    run_job(load_job(job_files.write_job(output={"max_projections": True,
                                                 "shard_frames": shard_frames})))
    assert len(done_at) == N_FRAMES // 3  # one record per task of 3 frames
    opened = JobStore.open(store, mode="r")
    residual = store / "diagnostics" / "residual" / "c" / "0"
    before: set[int] = set()
    previous = -1
    for mark, done in sorted(done_at.items()):
        assert residual in synced[previous + 1:mark]  # this record's diagnostics, first
        for t in done - before:
            for chunk in opened.frame_chunk_paths(t):  # its chunk files, or its shard files
                assert synced.index(chunk) < mark, (t, chunk)
                folder = chunk.parent
                while folder.name != "c":  # and its new folders
                    assert synced.index(folder) < mark, (t, folder)
                    folder = folder.parent
        before, previous = done, mark
    assert before == set(range(N_FRAMES))


def test_a_killed_runs_journal_cannot_undo_a_repair(finished):
    # A resumed run re-solved a chain (frames 3-5), committed them in its task's journal and
    # was killed before recording them; the rewritten frame 4 is then damaged on disk.
    from volrecon.pipeline.journal import FrameJournal, journal_paths

    job, store, reference = finished
    journal = FrameJournal(store, 3, 6)
    journal.commit([{"t": t, "status": STATUS_DONE, "iterations": 8, "objective": 1.0,
                     "residual": 0.1, "converged": False, "seconds": 0.1, "failure": None}
                    for t in (3, 4, 5)])
    journal.close()
    _flip_byte(_chunk_file(store, "0", DAMAGED_FRAME))
    report = verify_store(store)
    assert sorted(report.damaged) == [DAMAGED_FRAME] and not journal_paths(store)
    assert JobStore.open(store, mode="r").committed_status()[DAMAGED_FRAME] == STATUS_PENDING
    run_job(load_job(job))
    assert_bit_identical(read_store_arrays(store), read_store_arrays(reference))
