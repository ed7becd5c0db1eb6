"""Frames are committed one by one inside a task: progress moves from the first frame, and a
kill or Ctrl-C in the middle of a task keeps every frame committed so far (in a sharded store:
the shards written, on a stop and every flush interval with the frames so far), while the
resumed store stays bit-identical to an uninterrupted run."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile
import tomli_w
from jobdata import assert_bit_identical, bead_video, gaussian_psf, read_store_arrays

import volrecon
from volrecon.cli import main
from volrecon.pipeline import job as job_module
from volrecon.pipeline import load_job, run_job, store_status
from volrecon.pipeline.journal import FrameJournal, journal_paths, read_journal
from volrecon.pipeline.store import STATUS_DONE, JobStore

N_FRAMES = 24
#: Ends a hung child only; a quiet machine never waits for it.
DEADLINE_S = 600


def _write_job(folder: Path, *, shard_frames: int = 1,
               iterations: int = 150) -> Path:
    """One task of all frames (chains of 4), so only per-frame commits can show progress."""
    model = volrecon.PSFModel.from_stack(gaussian_psf((4, 40, 40)), depth_step_um=1.5,
                                         pixel_size_um=0.5)
    model.save(folder / "model")
    # A fixed seed: every job of this module holds the same video (one reference serves all).
    tifffile.imwrite(folder / "raw.tif",
                     bead_video(model, N_FRAMES, np.random.default_rng(20261204)))
    tifffile.imwrite(folder / "dark.tif", np.full((40, 40), 100, np.uint16))
    document = {
        "model": {"path": "model"},
        "video": {"path": "raw.tif", "dark": "dark.tif"},
        "solver": {"method": "admm", "iterations": iterations, "tv": 1e-3, "tol": 0.0,
                   "chain_frames": 4},
        "output": {"path": "out.zarr", "time_interval_s": 0.1, "max_projections": True,
                   "shard_frames": shard_frames, "levels": 2},
        "compute": {"scheduler": "threads", "workers": 1, "frames_per_task": N_FRAMES},
    }
    (folder / "job.toml").write_text(tomli_w.dumps(document))
    document["output"]["path"] = "reference.zarr"
    (folder / "reference.toml").write_text(tomli_w.dumps(document))
    return folder / "job.toml"


def _committed(store: Path) -> int:
    return sum(len(read_journal(p)) for p in journal_paths(store))


def _start_and_wait(job: Path, at_least: int, *, flush_interval: str = "10s",
                    seconds: float = 0.0) -> subprocess.Popen[str]:
    """Start `volrecon run` and wait until `at_least` frames are committed (or, with
    `seconds`, until the store has existed that long)."""
    env = {**os.environ, "DASK_VOLRECON__SHARD_FLUSH_INTERVAL": flush_interval}
    child = subprocess.Popen([sys.executable, "-m", "volrecon.cli", "run", str(job),
                              "--no-progress"], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True, env=env)
    store = job.parent / "out.zarr"
    deadline = time.monotonic() + DEADLINE_S
    created = None
    while time.monotonic() < deadline:
        if child.poll() is not None:
            pytest.fail(f"run ended early: {child.communicate()}")
        if created is None and (store / "diagnostics" / "status" / "commits").is_dir():
            created = time.monotonic()
        if _committed(store) >= at_least and (
                created is not None and time.monotonic() - created >= seconds):
            return child
        time.sleep(0.01)
    child.kill()
    pytest.fail("no frame was committed")


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> dict[str, np.ndarray]:
    """The uninterrupted run's arrays (the same values in every layout: test_shards.py)."""
    folder = tmp_path_factory.mktemp("commits-reference")
    _write_job(folder)
    run_job(load_job(folder / "reference.toml"))
    return read_store_arrays(folder / "reference.zarr")


def test_journal_drops_a_torn_line(tmp_path):
    journal = FrameJournal(tmp_path, 0, 4)
    entry = {"t": 0, "status": 1, "iterations": 5, "objective": float("nan"),
             "residual": 0.1, "converged": True, "seconds": 0.5, "failure": None}
    journal.commit([entry, {**entry, "t": 1}])
    journal.close()
    with open(journal.path, "a", encoding="utf-8") as f:
        f.write('{"t": 2, "status": 1, "iter')  # what a kill mid-write leaves
    frames = read_journal(journal.path)
    assert [f["t"] for f in frames] == [0, 1]
    assert np.isnan(frames[0]["objective"]) and frames[1]["converged"] is True


def test_progress_moves_inside_a_single_task(tmp_path, monkeypatch):
    monkeypatch.setattr(job_module, "PROGRESS_POLL_S", 0.01)
    job = _write_job(tmp_path, iterations=60)
    events = []
    result = run_job(load_job(job), progress=events.append)
    assert result.done == N_FRAMES
    seen = sorted({e.done for e in events})
    # One task holds every frame: without per-frame commits only 0 and 24 would be seen.
    assert len([d for d in seen if 0 < d < N_FRAMES]) >= 3, seen
    assert all(e.frames_per_second > 0 for e in events if e.computed)
    assert events[-1].done == N_FRAMES and not journal_paths(tmp_path / "out.zarr")


@pytest.mark.parametrize(("shard_frames", "flush_interval"),
                         [(1, "10s"), (4, "1h"), (N_FRAMES, "0.3s")])
def test_sigkill_inside_a_task_keeps_committed_frames(tmp_path, reference, capsys,
                                                      shard_frames, flush_interval):
    # One file per frame; shards of 4 committed as each is written; one shard of all the
    # frames, rewritten with the frames so far whenever nothing reached the disk for 0.3 s.
    job = _write_job(tmp_path, shard_frames=shard_frames)
    store = tmp_path / "out.zarr"

    child = _start_and_wait(job, at_least=5, flush_interval=flush_interval)
    child.kill()
    child.communicate(timeout=DEADLINE_S)
    committed = _committed(store)
    assert committed >= 5
    if flush_interval == "1h":
        assert committed % shard_frames == 0  # whole shards only

    # What the kill kept is visible before any resume, and equals the reference bit for bit.
    assert store_status(store).done == committed
    assert main(["status", str(store)]) == 0
    assert capsys.readouterr().out.splitlines()[0] == f"{committed}/{N_FRAMES}"
    status = JobStore.open(store, mode="r").committed_status()
    kept = np.flatnonzero(status == STATUS_DONE)
    assert kept.tolist() == list(range(committed))
    partial = read_store_arrays(store)
    for key in ("0", "projections/max_z"):
        assert partial[key][kept].tobytes() == reference[key][kept].tobytes(), key

    # The resume records them first, redoes only the chain the kill cut into, and ends
    # bit-identical to the uninterrupted run.
    result = run_job(load_job(job))
    assert result.done == N_FRAMES
    assert result.computed <= N_FRAMES - committed + max(4, shard_frames) - 1
    assert not journal_paths(store)
    assert_bit_identical(read_store_arrays(store), reference)


@pytest.mark.parametrize("shard_frames", [1, N_FRAMES])
def test_ctrl_c_inside_a_task_keeps_committed_frames_and_stops_soon(tmp_path, shard_frames):
    # With one shard of all the frames and no timed flush, only the flush on the stop can
    # keep the finished frames.
    job = _write_job(tmp_path, iterations=400, shard_frames=shard_frames)
    store = tmp_path / "out.zarr"
    child = _start_and_wait(job, at_least=3 if shard_frames == 1 else 0,
                            flush_interval="1h", seconds=0.0 if shard_frames == 1 else 4.0)
    child.send_signal(signal.SIGINT)
    _, err = child.communicate(timeout=DEADLINE_S)
    if child.returncode == 0:
        pytest.skip("the run finished before the signal landed")
    assert child.returncode == 130, err
    status = store_status(store)
    assert (3 if shard_frames == 1 else 1) <= status.done < N_FRAMES  # kept; stopped early
    assert status.runs[-1]["outcome"] == "interrupted"
    assert status.runs[-1]["frames_done_after"] == status.done
    assert not journal_paths(store)  # recorded before the run ended
