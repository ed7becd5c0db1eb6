"""The bad-input catalogue through the real CLI: every mistake ends in exit status 2, one line
on stderr naming the file or key and the fix, no traceback, and nothing on disk changed."""

from __future__ import annotations

import errno
import os
import subprocess
from pathlib import Path

import numpy as np
import pytest
import zarr
from catalogue import CASES, Case, markdown_table
from jobdata import N_FRAMES, assert_bit_identical, read_store_arrays
from reliability_tools import (
    FullDiskStore,
    one_error_line,
    run_cli,
    snapshot_changes,
    tree_snapshot,
)

from volrecon.cli import main
from volrecon.pipeline import StoreLock, load_job, run_job, store_status
from volrecon.pipeline.lock import lock_path_for
from volrecon.pipeline.store import STATUS_DONE, STATUS_PENDING, JobStore

RUNNABLE = [c for c in CASES if c.setup is not None and not c.warns]
WARNING_CASES = [c for c in CASES if c.warns]
#: Cases also run in a subprocess, to see the real stderr (tifffile's log lines included).
IN_SUBPROCESS = {"toml_syntax", "video_truncated", "video_broken_page_chain",
                 "output_damaged_status", "model_corrupt_chunk"}


def _check_line(line: str, case: Case) -> None:
    for fragment in case.expect:
        assert fragment in line, f"{case.name}: {fragment!r} not in {line!r}"


def test_catalogue_has_enough_cases_and_readme_lists_them():
    assert len(CASES) >= 25 and len({c.name for c in CASES}) == len(CASES)
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    assert "## What happens with bad input" in readme
    assert markdown_table() in readme, "README table is stale: python tests/reliability/" \
                                       "catalogue.py prints the current one"


@pytest.mark.parametrize("case", RUNNABLE, ids=[c.name for c in RUNNABLE])
def test_bad_input_gives_one_line_and_changes_nothing(case, job_copy, capsys):
    argv = case.setup(job_copy)
    before = tree_snapshot(job_copy.folder)
    capsys.readouterr()
    assert main(argv) == case.exit_status
    _out, err = capsys.readouterr()
    _check_line(one_error_line(err, argv[0]), case)
    assert snapshot_changes(before, tree_snapshot(job_copy.folder)) == {
        "created": [], "deleted": [], "modified": []}


@pytest.mark.parametrize("case", WARNING_CASES, ids=[c.name for c in WARNING_CASES])
def test_odd_input_gives_one_warning_line(case, job_copy, capsys):
    argv = case.setup(job_copy)
    capsys.readouterr()
    assert main(argv) == case.exit_status
    _out, err = capsys.readouterr()
    warned = [line for line in err.splitlines() if line.startswith("warning: ")]
    assert len(warned) == 1 and "Traceback" not in err, err
    _check_line(warned[0], case)


@pytest.mark.parametrize("name", sorted(IN_SUBPROCESS))
def test_bad_input_in_a_real_process(name, job_copy):
    (case,) = (c for c in CASES if c.name == name)
    argv = case.setup(job_copy)
    before = tree_snapshot(job_copy.folder)
    done = run_cli(argv)
    assert done.returncode == case.exit_status, done.stderr
    _check_line(one_error_line(done.stderr, argv[0]), case)
    assert tree_snapshot(job_copy.folder) == before


def test_debug_shows_the_traceback(job_copy):
    (case,) = (c for c in CASES if c.name == "video_truncated")
    argv = case.setup(job_copy)
    done = run_cli(["--debug", *argv])
    assert done.returncode != 0
    assert "Traceback (most recent call last)" in done.stderr
    assert "InputFileError" in done.stderr and "truncated" in done.stderr


def test_live_writer_refused(job_copy, capsys):
    store = job_copy.folder / "out.zarr"
    with StoreLock(store):  # this process holds it, as a live run would
        before = tree_snapshot(job_copy.folder)
        assert main(["run", str(job_copy.folder / "job.toml"), "--no-progress"]) == 2
        line = one_error_line(capsys.readouterr().err, "run")
        assert f"pid {os.getpid()}" in line and "another run is writing this store" in line
        assert "wait for it to finish" in line
        assert tree_snapshot(job_copy.folder) == before


def _half_done(files) -> Path:
    """Make out.zarr look like a run that stopped after frame 5: later frames pending."""
    store = files.folder / "out.zarr"
    status = zarr.open_array(store / "diagnostics" / "status", mode="r+")
    values = status[:]
    values[6:] = STATUS_PENDING
    status[:] = values
    opened = JobStore.open(store, mode="r")
    for t in range(6, N_FRAMES):  # their shard files (chains and shards of 3 frames)
        for path in opened.frame_chunk_paths(t):
            path.unlink(missing_ok=True)
    return store


def _finished_frame_files(store: Path) -> dict[str, str]:
    opened = JobStore.open(store, mode="r")
    files = {path.relative_to(store).as_posix() for t in range(6)
             for path in opened.frame_chunk_paths(t)}
    return {k: v for k, v in tree_snapshot(store).items() if k in files}


def test_disk_full_mid_write_keeps_finished_frames(job_copy, capsys, monkeypatch):
    reference = read_store_arrays(job_copy.folder / "out.zarr")
    store = _half_done(job_copy)
    finished = _finished_frame_files(store)
    job = job_copy.write_job("full.toml", compute={"scheduler": "synchronous",
                                                   "frames_per_task": 3})
    # A real zarr LocalStore whose disk fills after 2 more writes (the shard file of frames
    # 6 to 8, then a diagnostics chunk): the third write of this run raises ENOSPC, as
    # write() on a full disk does.
    monkeypatch.setattr(zarr.storage, "LocalStore", FullDiskStore)
    monkeypatch.setattr(FullDiskStore, "budget", 2)
    monkeypatch.setattr(FullDiskStore, "written", 0)
    assert main(["run", str(job), "--no-progress"]) == 2
    line = one_error_line(capsys.readouterr().err, "run")
    assert str(store) in line and "No space left on device" in line
    assert "free disk space, then run the same command again" in line
    assert not lock_path_for(store).exists()
    # Frames finished before are untouched, nothing is marked done that is not on disk.
    assert _finished_frame_files(store) == finished
    status = zarr.open_array(store / "diagnostics" / "status", mode="r")[:]
    assert (status[:6] == STATUS_DONE).all() and (status[6:] == STATUS_PENDING).all()
    # Space freed: the same command finishes the job, bit-identical to an uninterrupted run.
    monkeypatch.setattr(FullDiskStore, "budget", None)
    assert main(["run", str(job), "--no-progress"]) == 0
    assert_bit_identical(read_store_arrays(store), reference)


@pytest.fixture
def small_tmpfs(tmp_path):
    """A 100 KiB tmpfs (needs the right to mount; skipped where there is none)."""
    mount_point = tmp_path / "small_disk"
    mount_point.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=100k", "tmpfs",
                           str(mount_point)], capture_output=True, text=True, check=False)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({done.stderr.strip()}); the injected ENOSPC "
                    "test covers disk-full")
    yield mount_point
    subprocess.run(["umount", "-l", str(mount_point)], check=False)


def test_disk_full_on_a_small_tmpfs(job_copy, small_tmpfs):
    store = small_tmpfs / "out.zarr"
    # One file per chunk: many small files, so the disk fills mid-job (a sharded store of
    # this tiny job fits in 100 KiB).
    job = job_copy.write_job("tmpfs.toml", output={"path": str(store), "shard_frames": 1})
    before = tree_snapshot(job_copy.folder)
    done = run_cli(["run", str(job), "--no-progress"])
    assert done.returncode == 2, done.stderr
    line = one_error_line(done.stderr, "run")
    assert str(store) in line and "No space left on device" in line
    assert "free disk space" in line
    assert tree_snapshot(job_copy.folder) == before
    partial = store_status(store)
    assert partial.done < N_FRAMES and not partial.running
    # Frames the status calls done are complete on disk (a full disk never tears a chunk).
    volumes = zarr.open_array(store / "0", mode="r")
    reference = zarr.open_array(job_copy.folder / "out.zarr" / "0", mode="r")
    status = zarr.open_array(store / "diagnostics" / "status", mode="r")[:]
    for t in np.flatnonzero(status == STATUS_DONE):
        assert volumes[t].tobytes() == reference[t].tobytes()
    # More space: the same command continues and finishes it.
    subprocess.run(["mount", "-o", "remount,size=4m", str(small_tmpfs)], check=True)
    assert run_cli(["run", str(job), "--no-progress"]).returncode == 0
    assert_bit_identical(read_store_arrays(store), read_store_arrays(job_copy.folder /
                                                                     "out.zarr"))


def test_newer_store_is_never_wiped(job_copy):
    """A store from another format version used to be taken for an interrupted creation and
    deleted; it must be refused and kept."""
    (case,) = (c for c in CASES if c.name == "output_newer_format")
    case.setup(job_copy)
    before = tree_snapshot(job_copy.folder / "out.zarr")
    with pytest.raises(OSError, match="output store format 4"):
        run_job(load_job(job_copy.folder / "job.toml"))
    assert tree_snapshot(job_copy.folder / "out.zarr") == before


def test_enospc_is_not_taken_for_another_oserror(job_copy, monkeypatch):
    """Only write failures become OutputWriteError; the errno is kept for callers."""
    store = _half_done(job_copy)
    monkeypatch.setattr(zarr.storage, "LocalStore", FullDiskStore)
    monkeypatch.setattr(FullDiskStore, "budget", 0)
    monkeypatch.setattr(FullDiskStore, "written", 0)
    job = load_job(job_copy.write_job("full.toml", compute={"scheduler": "synchronous"}))
    with pytest.raises(OSError) as raised:
        run_job(job)
    assert type(raised.value).__name__ == "OutputWriteError"
    assert isinstance(raised.value.__cause__, OSError)
    assert raised.value.__cause__.errno == errno.ENOSPC
    assert store_status(store).done == 6
