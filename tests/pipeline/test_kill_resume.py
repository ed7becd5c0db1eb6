"""A real `volrecon run` process stopped by Ctrl-C, then killed with SIGKILL, then resumed:
the store ends bit-identical to an uninterrupted run."""

from __future__ import annotations

import json
import shutil
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
from volrecon.errors import InputFileError
from volrecon.pipeline import load_job, run_job, store_status
from volrecon.pipeline.lock import lock_path_for, read_lock
from volrecon.pipeline.store import is_job_store

N_FRAMES = 48
#: Deadlines only end a hung child: a quiet machine never waits for them, and a heavily
#: loaded one (the SIGINT waits for the tasks in flight) gets plenty of time.
DEADLINE_S = 600


@pytest.fixture
def slow_job(tmp_path, rng) -> Path:
    """A job that takes a few seconds, in tasks of 4 frames with chains of 2."""
    model = volrecon.PSFModel.from_stack(gaussian_psf((4, 40, 40)), depth_step_um=1.5,
                                         pixel_size_um=0.5)
    model.save(tmp_path / "model")
    tifffile.imwrite(tmp_path / "raw.tif", bead_video(model, N_FRAMES, rng))
    tifffile.imwrite(tmp_path / "dark.tif", np.full((40, 40), 100, np.uint16))  # its offset
    document = {
        "model": {"path": "model"},
        "video": {"path": "raw.tif", "dark": "dark.tif"},
        "solver": {"method": "admm", "iterations": 120, "tv": 1e-3, "tol": 0.0,
                   "chain_frames": 2},
        "output": {"path": "out.zarr", "time_interval_s": 0.1, "max_projections": True},
        "compute": {"scheduler": "threads", "workers": 2, "frames_per_task": 4},
    }
    (tmp_path / "job.toml").write_text(tomli_w.dumps(document))
    document["output"]["path"] = "reference.zarr"
    (tmp_path / "reference.toml").write_text(tomli_w.dumps(document))
    return tmp_path / "job.toml"


def _start(job: Path) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "volrecon.cli", "run", str(job),
                             "--no-progress"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)


def _wait_for_done(store: Path, child: subprocess.Popen[str], at_least: int) -> int:
    deadline = time.monotonic() + DEADLINE_S
    while time.monotonic() < deadline:
        if child.poll() is not None:
            pytest.fail(f"run ended early: {child.communicate()}")
        if is_job_store(store):
            try:
                done = store_status(store).done
            except InputFileError:  # the child is still creating the store
                done = 0
            if done >= at_least:
                return done
        time.sleep(0.02)
    child.kill()
    pytest.fail("run made no progress")


def test_interrupt_then_sigkill_then_resume_bit_identical(slow_job, capsys):
    folder = slow_job.parent
    store = folder / "out.zarr"
    run_job(load_job(folder / "reference.toml"))
    reference = read_store_arrays(folder / "reference.zarr")

    # 1. Ctrl-C: a clean stop, lock released, run recorded as interrupted. On a fast machine
    #    the run can finish before the signal lands (exit 0); then start over and try again.
    for _attempt in range(3):
        child = _start(slow_job)
        _wait_for_done(store, child, at_least=2)
        child.send_signal(signal.SIGINT)
        _, err = child.communicate(timeout=DEADLINE_S)
        if child.returncode != 0:
            break
        shutil.rmtree(store)
    assert child.returncode == 130, err
    assert "interrupted" in err and "run the same command again" in err
    assert not lock_path_for(store).exists()
    after_interrupt = store_status(store)
    assert after_interrupt.runs[-1]["outcome"] == "interrupted"
    assert 2 <= after_interrupt.done < N_FRAMES

    # 2. Resume in a new process and SIGKILL it mid-way: the lock file stays behind.
    child = _start(slow_job)
    _wait_for_done(store, child, at_least=after_interrupt.done + 2)
    live = store_status(store)
    assert live.running and live.holder["pid"] == child.pid and live.state == "running"
    child.kill()
    child.communicate(timeout=DEADLINE_S)
    stale = read_lock(store)
    assert stale is not None and stale["pid"] == child.pid

    # `volrecon status` after the kill: exit 0, first line <done>/<total>.
    assert main(["status", str(store)]) == 0
    lines = capsys.readouterr().out.splitlines()
    done, total = map(int, lines[0].split("/"))
    assert total == N_FRAMES and done < N_FRAMES and lines[1].startswith("state: stopped")

    # 3. Resume here: the stale lock is taken over; nothing already done is recomputed
    #    beyond the chains the kill cut into.
    before_resume = read_store_arrays(store)
    result = run_job(load_job(slow_job))
    assert result.done == N_FRAMES and result.computed <= N_FRAMES - done + 4
    try:
        assert_bit_identical(read_store_arrays(store), reference)
    except AssertionError as exc:
        raise AssertionError(f"{exc}; status before resume "
                             f"{before_resume['diagnostics/status'].tolist()}; "
                             f"after interrupt {after_interrupt.done}") from None
    runs = json.loads((store / "zarr.json").read_text())["attributes"]["volrecon"]["runs"]
    assert [r["outcome"] for r in runs] == ["interrupted", "running", "complete"]
    assert np.all(read_store_arrays(store)["diagnostics/status"] == 1)

