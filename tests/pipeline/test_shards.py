"""Sharded stores (format 3): shard files written whole by their task, byte for byte what zarr's
own sharding codec writes, few files for long videos, resumable after kills, readable per frame,
and old one-file-per-chunk stores still resumed."""

from __future__ import annotations

import json
import shutil
import signal
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zarr
from jobdata import N_FRAMES, assert_bit_identical, read_store_arrays

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "reliability"))
from reliability_tools import finish, run_cli, start_cli

from volrecon.cli import main
from volrecon.errors import ConfigError
from volrecon.io.ome_zarr import chunk_codecs
from volrecon.pipeline import load_job, run_job
from volrecon.pipeline.plan import plan_tasks
from volrecon.pipeline.shards import ShardBuffer, shard_file
from volrecon.pipeline.store import STATUS_DONE, JobStore, store_file_count
from volrecon.pipeline.verify import verify_store


def _files(store: Path) -> list[Path]:
    return [p for p in store.rglob("*") if p.is_file()]


# ----------------------------------------------------------------------------- shard bytes
@pytest.mark.parametrize(("shape", "chunks", "shards"), [
    ((10, 3, 8, 8), (1, 3, 8, 8), (4, 3, 8, 8)),   # last shard short (frames 8, 9)
    ((7, 4, 6, 5), (1, 2, 6, 5), (7, 4, 6, 5)),    # frames split along z into inner chunks
    ((5, 6, 6), (1, 6, 6), (2, 6, 6)),             # a projection
])
def test_shard_buffer_writes_what_zarrs_sharding_codec_writes(tmp_path, shape, chunks, shards):
    # Reference: zarr-python's own ShardingCodec writing the same arrays whole.
    group = zarr.open_group(tmp_path, mode="w", zarr_format=3)
    settings = dict(shape=shape, chunks=chunks, shards=shards, dtype="float32",
                    fill_value=np.nan, compressors=chunk_codecs(3))
    reference, ours = group.create_array("a", **settings), group.create_array("b", **settings)
    data = np.random.default_rng(4).random(shape).astype(np.float32)
    data[1] = np.nan  # a failed frame: no inner chunk, an empty index entry
    reference[...] = data
    for shard in range(-(-shape[0] // shards[0])):
        buffer = ShardBuffer(tmp_path, ours, shard)
        for t in range(buffer.start, buffer.stop):
            buffer.add(t, data[t])
        buffer.write()
    for t in range(0, shape[0], shards[0]):
        assert (shard_file(tmp_path, ours, t).read_bytes()
                == shard_file(tmp_path, reference, t).read_bytes())
    assert np.array_equal(ours[...], data, equal_nan=True)
    assert not list(tmp_path.rglob("*.partial"))


def test_shard_buffer_refuses_to_write_a_shard_with_a_frame_missing(tmp_path):
    group = zarr.open_group(tmp_path, mode="w", zarr_format=3)
    array = group.create_array("a", shape=(8, 4, 4), chunks=(1, 4, 4), shards=(4, 4, 4),
                               dtype="float32", fill_value=np.nan, compressors=chunk_codecs(3))
    buffer = ShardBuffer(tmp_path, array, 1)
    buffer.add(4, np.ones((4, 4), np.float32))
    with pytest.raises(ValueError, match=r"frames \[5, 6, 7\]"):
        buffer.write()
    with pytest.raises(ValueError, match="not one of frames 4:8"):
        buffer.add(0, np.ones((4, 4), np.float32))
    assert not shard_file(tmp_path, array, 4).exists()


# ------------------------------------------------------------------------------- planning
def test_tasks_cover_whole_shards_and_whole_chains():
    status = np.zeros(20, np.uint8)
    status[:8] = STATUS_DONE
    status[9] = STATUS_DONE
    # Shards of 4 over chains of 2: a block of 4 with one pending frame is redone whole.
    tasks = plan_tasks(status, chain_frames=2, frames_per_task=2, shard_frames=4)
    assert [(t.start, t.stop) for t in tasks] == [(8, 12), (12, 16), (16, 20)]
    # Shards of 2 inside chains of 4: blocks are the chains.
    tasks = plan_tasks(status, chain_frames=4, frames_per_task=8, shard_frames=2)
    assert [(t.start, t.stop) for t in tasks] == [(8, 16), (16, 20)]
    with pytest.raises(ConfigError, match="divisor or a multiple"):
        plan_tasks(status, chain_frames=4, frames_per_task=8, shard_frames=3)


def test_a_shard_length_that_splits_chains_is_one_line_naming_the_key(job_files, capsys):
    job = job_files.write_job(output={"shard_frames": 2})  # chains of 3
    assert main(["run", str(job), "--no-progress"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "output.shard_frames" in err and "3" in err


# ------------------------------------------------------------------------------ end to end
@pytest.fixture(scope="module")
def long_job(tmp_path_factory):
    """200 frames of 2 x 8 x 8 (tiny solves), chains of 16, sharded (default: 16 frames per
    file) and unsharded (shard_frames = 1) runs of the same job."""
    import tifffile
    from jobdata import bead_video, gaussian_psf

    import volrecon

    folder = tmp_path_factory.mktemp("long")
    model = volrecon.PSFModel.from_stack(gaussian_psf((2, 8, 8)), depth_step_um=2.0,
                                         pixel_size_um=0.65)
    model.save(folder / "model")
    raw = bead_video(model, 200, np.random.default_rng(9))
    tifffile.imwrite(folder / "raw.tif", raw, photometric="minisblack")
    tifffile.imwrite(folder / "dark.tif", np.full(raw.shape[1:], 100, np.uint16),
                     photometric="minisblack")  # bead_video's camera offset
    document = {
        "model": {"path": "model"}, "video": {"path": "raw.tif", "dark": "dark.tif"},
        "solver": {"method": "fista", "iterations": 3, "tol": 0.0, "chain_frames": 16},
        "output": {"path": "sharded.zarr", "time_interval_s": 0.05, "max_projections": True},
        "compute": {"scheduler": "threads", "workers": 2, "frames_per_task": 16},
    }
    import tomli_w

    (folder / "sharded.toml").write_text(tomli_w.dumps(document))
    document["output"] |= {"path": "unsharded.zarr", "shard_frames": 1}
    (folder / "unsharded.toml").write_text(tomli_w.dumps(document))
    for name in ("sharded", "unsharded"):
        run_job(load_job(folder / f"{name}.toml"))
    return folder


def test_a_long_video_takes_one_file_per_shard_and_equals_the_unsharded_store(long_job):
    sharded, unsharded = long_job / "sharded.zarr", long_job / "unsharded.zarr"
    assert_bit_identical(read_store_arrays(sharded), read_store_arrays(unsharded))
    n_sharded, n_unsharded = len(_files(sharded)), len(_files(unsharded))
    # 200 frames, 16 per file, 4 frame arrays: 4 * 13 shard files; the constant is the
    # zarr.json files (13) and at most one chunk per diagnostics array (6; a chunk holding
    # only the fill value, e.g. 'converged' all false, is not written).
    frame_files = [p for p in _files(sharded) if p.parts[-5:-4] == ("c",)
                   or p.parts[-4:-3] == ("c",)]
    assert len(frame_files) == 4 * 13
    assert len(list(sharded.rglob("zarr.json"))) == 13
    assert 4 * 13 + 13 < n_sharded <= 4 * 13 + 13 + 6
    assert n_unsharded - n_sharded == 4 * (200 - 13)
    assert n_sharded <= store_file_count(200, (2, 8, 8), shard_frames=16, projections=True)
    assert n_unsharded <= store_file_count(200, (2, 8, 8), shard_frames=1, projections=True)
    store = JobStore.open(sharded)
    assert store.shard_frames == 16 and store.attributes["format_version"] == 3
    for array in store.frame_arrays().values():  # every frame still carries its checksum
        (codec,) = array.metadata.codecs
        assert [c.to_dict()["name"] for c in codec.codecs] == ["bytes", "zstd", "crc32c"]
        assert "crc32c" in [c.to_dict()["name"] for c in codec.index_codecs]


def test_the_estimate_reports_the_file_count(long_job, capsys):
    assert main(["run", str(long_job / "sharded.toml"), "--estimate"]) == 0
    out = capsys.readouterr().out
    expected = store_file_count(200, (2, 8, 8), shard_frames=16, projections=True)
    assert f"in at most {expected} files (16 frames per file)" in out
    assert f"{store_file_count(108_000, (2, 8, 8), shard_frames=16, projections=True)} files" \
        in out


def test_ome_zarr_models_validates_a_sharded_store(long_job):
    # Reference: ome-zarr-models (OME-NGFF 0.5 image), reading the store itself.
    from ome_zarr_models.v05.image import Image

    Image.from_zarr(zarr.open_group(long_job / "sharded.zarr", mode="r"))


def test_one_time_step_reads_one_frames_bytes_not_a_shards(tmp_path):
    # Bytes read by this process (Linux /proc/self/io, rchar) while napari's lazy layer data
    # computes one frame of a 64-frame store in shards of 32 (written as a job's tasks write).
    from volrecon.bench.store import write_store
    from volrecon.napari.stores import output_store_layers

    store = tmp_path / "long.zarr"
    write_store(store, 64, (4, 64, 64), shard_frames=32)
    data = output_store_layers(store)[0][0]
    data = data[0] if isinstance(data, list) else data
    shard = shard_file(store, JobStore.open(store).image, 40).stat().st_size

    def rchar() -> int:
        text = Path("/proc/self/io").read_text()
        return int(next(line.split()[1] for line in text.splitlines()
                        if line.startswith("rchar")))

    np.asarray(data[39])  # warm: metadata read
    before = rchar()
    frame = np.asarray(data[40])
    read = rchar() - before
    assert np.isfinite(frame).all()
    assert read < 3 * shard / 32, (read, shard)  # one frame's share of the shard, and the index


def test_verify_finds_a_damaged_frame_inside_a_shard_and_the_rerun_rewrites_the_shard(
        long_job, tmp_path):
    store = tmp_path / "sharded.zarr"
    shutil.copytree(long_job, tmp_path, dirs_exist_ok=True)
    reference = read_store_arrays(store)
    path = shard_file(store, JobStore.open(store).image, 20)
    data = bytearray(path.read_bytes())
    data[40] ^= 0x10  # inside the first inner chunk of the shard: frame 16
    path.write_bytes(bytes(data))
    report = verify_store(store)
    assert sorted(report.damaged) == [16]
    assert path.exists()  # the shard holds 15 good frames: never deleted
    assert JobStore.open(store).status()[16] != STATUS_DONE
    run_job(load_job(tmp_path / "sharded.toml"))
    assert_bit_identical(read_store_arrays(store), reference)
    assert not verify_store(store).damaged


def test_a_damaged_shard_index_sends_back_every_frame_of_the_shard(long_job, tmp_path):
    shutil.copytree(long_job, tmp_path, dirs_exist_ok=True)
    store = tmp_path / "sharded.zarr"
    reference = read_store_arrays(store)
    path = shard_file(store, JobStore.open(store).image, 40)
    data = bytearray(path.read_bytes())
    data[-10] ^= 0x10  # the index sits at the end of the file, with its own crc32c
    path.write_bytes(bytes(data))
    assert sorted(verify_store(store).damaged) == list(range(32, 48))
    run_job(load_job(tmp_path / "sharded.toml"))
    assert_bit_identical(read_store_arrays(store), reference)


# --------------------------------------------------------------------------- kills, resume
@pytest.mark.parametrize("moment", ["inside a shard", "at the end of a shard"])
def test_sigkill_inside_and_at_the_end_of_a_shard_then_resume_bit_identical(long_job,
                                                                            tmp_path, moment):
    import tomli_w

    folder = tmp_path
    shutil.copy(long_job / "raw.tif", folder)
    shutil.copy(long_job / "dark.tif", folder)
    shutil.copytree(long_job / "model", folder / "model")
    document = {
        "model": {"path": "model"}, "video": {"path": "raw.tif", "dark": "dark.tif"},
        "solver": {"method": "fista", "iterations": 3, "tol": 0.0, "chain_frames": 16},
        "output": {"path": "out.zarr", "time_interval_s": 0.05, "max_projections": True},
        "compute": {"scheduler": "synchronous", "frames_per_task": 16},
    }
    (folder / "job.toml").write_text(tomli_w.dumps(document))
    # The reference is an uninterrupted run of the same command (scheduler independence is
    # test_schedulers.py's).
    document["output"]["path"] = "reference.zarr"
    (folder / "reference.toml").write_text(tomli_w.dumps(document))
    assert run_cli(["run", str(folder / "reference.toml"), "--no-progress"]).returncode == 0
    reference = read_store_arrays(folder / "reference.zarr")
    rng = np.random.default_rng(2026 if moment == "inside a shard" else 1203)
    store = folder / "out.zarr"
    volume_folder = store / "0" / "c"
    kills = 0
    for _ in range(3):  # three kills, each at a seeded shard of what is left
        child = start_cli(["run", str(folder / "job.toml"), "--no-progress"])
        before = _shard_count(volume_folder)
        target = before + int(rng.integers(1, 4))
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline and child.poll() is None:
            if _shard_count(volume_folder) >= target:
                break  # a shard file just appeared: its frames are not yet recorded
            time.sleep(0.001)
        if moment == "inside a shard":  # into the computation of the next shard's frames
            time.sleep(float(rng.uniform(0.01, 0.08)))
        child.send_signal(signal.SIGKILL)
        finish(child)
        kills += child.returncode == -signal.SIGKILL
    assert kills >= 2
    done = run_cli(["run", str(folder / "job.toml"), "--no-progress"])
    assert done.returncode == 0, done.stderr
    assert_bit_identical(read_store_arrays(store), reference)
    assert not list(store.rglob("*.partial"))


def _shard_count(volume_folder: Path) -> int:
    """Shard files of the volume written so far (``0/c/<t>/0/0/0``)."""
    return len(list(volume_folder.glob("*/0/0/0"))) if volume_folder.exists() else 0


# ------------------------------------------------------------------------------ old layout
def test_a_format_2_store_one_file_per_chunk_resumes_in_its_own_layout(job_files):
    # The tiny job (12 frames, chains of 3) stopped after its first task, as a format 2 store
    # (the layout before shards: one file per chunk) left it.
    job = job_files.write_job(output={"shard_frames": 1})
    reference_job = job_files.write_job("reference.toml", output={"path": "reference.zarr"})
    run_job(load_job(reference_job))
    run_job(load_job(job))
    store = job_files.folder / "out.zarr"
    opened = JobStore.open(store, mode="r+")
    opened.update_attributes(format_version=2)
    attributes = opened.attributes
    del attributes["shard_frames"]
    opened.group.attrs["volrecon"] = attributes
    opened.mark_pending(range(6, N_FRAMES))
    for t in range(6, N_FRAMES):
        for path in opened.frame_chunk_paths(t):
            path.unlink(missing_ok=True)
    run_job(load_job(job))
    reopened = JobStore.open(store)
    assert reopened.attributes["format_version"] == 2 and reopened.shard_frames == 1
    assert len(list((store / "0" / "c").iterdir())) == N_FRAMES  # one folder per frame
    ours, theirs = read_store_arrays(store), read_store_arrays(job_files.folder /
                                                                "reference.zarr")
    assert_bit_identical(ours, theirs)  # the sharded reference holds the same numbers


def test_a_store_of_a_newer_format_is_one_line_naming_its_version(job_files, capsys):
    job = job_files.write_job()
    run_job(load_job(job))
    zarr_json = job_files.folder / "out.zarr" / "zarr.json"
    document = json.loads(zarr_json.read_text())
    document["attributes"]["volrecon"]["format_version"] = 4
    zarr_json.write_text(json.dumps(document))
    assert main(["status", str(job_files.folder / "out.zarr")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "format 4" in err

