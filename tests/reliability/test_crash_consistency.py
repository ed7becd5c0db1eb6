"""A real `volrecon run` process killed with SIGKILL at random moments, again and again, each
time resumed: after every kill the store holds no torn or wrong frame, and the finished store is
bit-identical to an uninterrupted run. SIGINT and SIGTERM stop it cleanly with a message."""

from __future__ import annotations

import shutil
import signal
import subprocess
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
import tifffile
import tomli_w
import zarr
from jobdata import assert_bit_identical, bead_video, gaussian_psf, read_store_arrays
from reliability_tools import finish, one_error_line, run_cli, start_cli, wait_until

import volrecon
from volrecon.pipeline import store_status
from volrecon.pipeline.lock import lock_path_for
from volrecon.pipeline.store import (
    STATUS_DONE,
    STATUS_PENDING,
    creation_interrupted,
    is_job_store,
    is_vacant,
)

N_FRAMES = 16
KILLS = 20


@pytest.fixture(scope="module")
def crash_job(tmp_path_factory) -> dict:
    """A job of a few seconds (16 frames, 2 per task, 4 planes of 24 x 24, 40 ADMM
    iterations, synchronous: one frame at a time, so a kill lands anywhere in the write
    sequence), its uninterrupted reference store and timings of that reference run."""
    folder = tmp_path_factory.mktemp("crash")
    model = volrecon.PSFModel.from_stack(gaussian_psf((4, 24, 24)), depth_step_um=1.5,
                                         pixel_size_um=0.5)
    model.save(folder / "model")
    tifffile.imwrite(folder / "raw.tif", bead_video(model, N_FRAMES, np.random.default_rng(3)),
                     photometric="minisblack")
    tifffile.imwrite(folder / "dark.tif", np.full((24, 24), 100, np.uint16))  # its offset
    document = {
        "model": {"path": "model"},
        "video": {"path": "raw.tif", "dark": "dark.tif"},
        "solver": {"method": "admm", "iterations": 40, "tv": 1e-3, "tol": 0.0,
                   "chain_frames": 2},
        "output": {"path": "reference.zarr", "time_interval_s": 0.1, "max_projections": True},
        "compute": {"scheduler": "synchronous", "frames_per_task": 2},
    }
    (folder / "reference.toml").write_text(tomli_w.dumps(document))
    document["output"]["path"] = "out.zarr"
    (folder / "job.toml").write_text(tomli_w.dumps(document))
    # The reference is a clean run of the same command; its timing sets the kill moments.
    started = time.monotonic()
    child = start_cli(["run", str(folder / "reference.toml"), "--no-progress"])
    wait_until(lambda: (folder / "reference.zarr" / "zarr.json").exists(), child,
               what="the reference store")
    store_after_s = time.monotonic() - started
    _out, err = finish(child)
    assert child.returncode == 0, err
    return {"folder": folder, "job": folder / "job.toml",
            "reference": read_store_arrays(folder / "reference.zarr"),
            "store_after_s": store_after_s, "run_s": time.monotonic() - started}


def _check_consistent(store: Path, reference: dict[str, np.ndarray]) -> tuple[str, int]:
    """Assert that a store left by a killed run can only be continued correctly; return its
    state and how many frames are done. Every frame either is marked done and equals the
    reference bit for bit (volume, projections, diagnostics), or is pending and still
    unwritten (NaN) or already complete (written, not yet marked): nothing torn, nothing
    marked done early."""
    if not store.exists():
        return "no store yet", 0
    if not is_job_store(store):
        assert is_vacant(store), sorted(p.name for p in store.iterdir())
        return "first write cut", 0
    if creation_interrupted(store):
        return "creation cut", 0
    store_status(store)  # readable as `volrecon status` reads it
    group = zarr.open_group(store, mode="r")
    status = group["diagnostics/status"][:]
    assert set(np.unique(status)) <= {STATUS_PENDING, STATUS_DONE}
    for name in ("0", "projections/max_z", "projections/max_y", "projections/max_x"):
        array = group[name]
        for t in range(N_FRAMES):
            frame = array[t]  # decodes: a torn chunk would raise here
            expected = reference[name][t]
            if status[t] == STATUS_DONE or not np.isnan(frame).all():
                assert frame.tobytes() == expected.tobytes(), (name, t, status.tolist())
    done = status == STATUS_DONE
    for name in ("iterations", "objective", "residual", "converged"):
        values = group[f"diagnostics/{name}"][:]
        assert values[done].tobytes() == reference[f"diagnostics/{name}"][done].tobytes(), name
    return ("complete" if done.all() else "partly done"), int(done.sum())


def test_sigkill_at_random_moments_then_resume(crash_job):
    folder, job, reference = crash_job["folder"], crash_job["job"], crash_job["reference"]
    store = folder / "out.zarr"
    rng = np.random.default_rng(61204)
    # Kill moments: uniform from process start-up (before the store exists) to the expected
    # end of this run, which shrinks as a resumed run has fewer frames left.
    startup_s = crash_job["store_after_s"]
    frame_s = max(crash_job["run_s"] - startup_s, 0.1) / N_FRAMES
    kills, rounds, states, done_frames = 0, 0, Counter(), 0
    started = time.monotonic()
    while kills < KILLS:
        child = start_cli(["run", str(job), "--no-progress"])
        delay = rng.uniform(0.5 * startup_s, startup_s + (N_FRAMES - done_frames) * frame_s)
        try:
            child.wait(timeout=delay)
        except subprocess.TimeoutExpired:
            child.kill()
        _out, err = finish(child)
        if child.returncode == -signal.SIGKILL:
            kills += 1
        else:
            assert child.returncode == 0 and err == "", (child.returncode, err)
        state, done_frames = _check_consistent(store, reference)
        states[state] += 1
        if state == "complete":  # resumed to the end: compare, then a fresh round
            assert_bit_identical(read_store_arrays(store), reference)
            if child.returncode == -signal.SIGKILL:
                # Killed after its last frame, inside the run record's final write: the
                # same command finishes the record and removes the temporary file.
                again = run_cli(["run", str(job), "--no-progress"])
                assert again.returncode == 0 and again.stderr == "", again.stderr
                assert_bit_identical(read_store_arrays(store), reference)
            assert not list(store.rglob("*.partial"))
            rounds += 1
            shutil.rmtree(store)
            lock_path_for(store).unlink(missing_ok=True)
            done_frames = 0
    # The last store is resumed to the end by one more run of the same command.
    done = run_cli(["run", str(job), "--no-progress"])
    assert done.returncode == 0 and done.stderr == "", done.stderr
    assert_bit_identical(read_store_arrays(store), reference)
    assert not list(store.rglob("*.partial")) and not lock_path_for(store).exists()
    print(f"\n{kills} SIGKILLs in {time.monotonic() - started:.1f} s (start-up "
          f"{startup_s:.2f} s, {frame_s:.3f} s per frame), {rounds} stores resumed to "
          f"completion before the last; states seen after a run: {dict(states)}")
    assert states["partly done"] >= 5  # most kills land while frames are being written


def test_sigint_and_sigterm_stop_cleanly_and_resume(crash_job):
    folder, reference = crash_job["folder"], crash_job["reference"]
    job = folder / "stopped.toml"
    job.write_text(crash_job["job"].read_text().replace('"out.zarr"', '"stopped.zarr"'))
    store = folder / "stopped.zarr"
    rng = np.random.default_rng(2)
    done = 0
    for signum in (signal.SIGINT, signal.SIGTERM):  # Ctrl-C; a batch system's stop
        child = start_cli(["run", str(job), "--no-progress"])
        at_least = done + int(rng.integers(1, 4))
        wait_until(lambda n=at_least: is_job_store(store) and not creation_interrupted(store)
                   and store_status(store).done >= n, child, what=f"{at_least} frames")
        child.send_signal(signum)
        _out, err = finish(child)
        assert child.returncode == 130, err
        line = one_error_line(err, "run")
        assert "interrupted with" in line and "run the same command again to continue" in line
        stopped = store_status(store)
        assert not lock_path_for(store).exists() and not stopped.running
        assert stopped.runs[-1]["outcome"] == "interrupted"
        assert f"{stopped.done}/{N_FRAMES}" in line
        state, done = _check_consistent(store, reference)
        assert state == "partly done" and done == stopped.done
    finished = run_cli(["run", str(job), "--no-progress"])
    assert finished.returncode == 0, finished.stderr
    assert_bit_identical(read_store_arrays(store), reference)
    outcomes = [run["outcome"] for run in store_status(store).runs]
    assert outcomes == ["interrupted", "interrupted", "complete"]


class _Killed(BaseException):
    """Stands for SIGKILL inside the writer: no handler of volrecon's catches it."""


def test_store_first_file_half_written_is_made_again(job_copy):
    """A kill inside the store's very first write leaves a folder holding only zarr's
    temporary file (``zarr.<uuid>.partial``, renamed into place when complete)."""
    from volrecon.pipeline import load_job, run_job

    reference = read_store_arrays(job_copy.folder / "out.zarr")
    store = job_copy.folder / "cut.zarr"
    store.mkdir()
    (store / f"zarr.{'0' * 32}.partial").write_bytes(b'{"attributes": {"volr')
    result = run_job(load_job(job_copy.write_job("cut.toml", output={"path": "cut.zarr"})))
    assert result.done == result.total
    assert_bit_identical(read_store_arrays(store), reference)


@pytest.mark.parametrize("writes", [1, 2, 6, 11, 12])
def test_store_cut_during_creation_is_made_again(job_copy, monkeypatch, writes):
    """The writer stopped dead after its first `writes` metadata writes (of 12 before the
    first chunk: group, image array, OME attributes, diagnostics, 'ready', the run record):
    the windows are too short for the random kills to hit reliably."""
    from volrecon.pipeline import load_job, run_job

    class CutStore(zarr.storage.LocalStore):
        count = 0

        async def set(self, key, value):
            if CutStore.count >= writes:
                raise _Killed
            CutStore.count += 1
            await super().set(key, value)

    reference = read_store_arrays(job_copy.folder / "out.zarr")
    job = load_job(job_copy.write_job("cut.toml", output={"path": "cut.zarr"},
                                      compute={"scheduler": "synchronous"}))
    with monkeypatch.context() as patch:
        patch.setattr(zarr.storage, "LocalStore", CutStore)
        with pytest.raises(_Killed):
            run_job(job)
    assert is_job_store(job.output_path)  # recognisable from the first write on
    result = run_job(job)
    assert result.done == result.total
    assert_bit_identical(read_store_arrays(job.output_path), reference)
