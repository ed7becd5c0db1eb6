"""dask.distributed workers killed with SIGKILL in the middle of a job.

On ``scheduler = "local-cluster"`` one worker is killed at seeded moments (when the store's
done-frame count reaches a seeded value): the job goes on on the other worker (the nanny starts
a replacement), the store ends bit-identical to an uninterrupted run, and the run record and
``volrecon status`` name the lost worker. On a ``tcp://`` scheduler whose workers have no nanny,
both workers are killed one after the other: the run ends with one line and exit 2, the frames
done stay valid, and the same command, once workers are back, finishes the store bit-identical.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import dask.config
import jsonschema
import numpy as np
import psutil
import pytest
import tifffile
import tomli_w
import zarr
from distributed import Client, LocalCluster
from jobdata import assert_bit_identical, bead_video, gaussian_psf, read_store_arrays
from reliability_tools import DEADLINE_S, finish, one_error_line, run_cli, start_cli

import volrecon
from volrecon.errors import ConfigError, WorkersLostError
from volrecon.pipeline import load_job, run_job, store_status
from volrecon.pipeline.execute import no_workers_timeout_s
from volrecon.pipeline.store import STATUS_DONE, is_job_store

N_FRAMES = 16
KILL_MOMENTS = 5


@pytest.fixture(scope="module")
def lost_job(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """A tiny job on a LocalCluster of 2 worker processes (16 frames, 2 per task, 3 planes of
    24 x 24, 60 ADMM iterations), its TOML document and the arrays of its uninterrupted run."""
    folder = tmp_path_factory.mktemp("lost")
    model = volrecon.PSFModel.from_stack(gaussian_psf((3, 24, 24)), depth_step_um=1.5,
                                         pixel_size_um=0.5)
    model.save(folder / "model")
    tifffile.imwrite(folder / "raw.tif", bead_video(model, N_FRAMES, np.random.default_rng(5)),
                     photometric="minisblack")
    tifffile.imwrite(folder / "dark.tif", np.full((24, 24), 100, np.uint16))  # its offset
    document = {
        "model": {"path": "model"},
        "video": {"path": "raw.tif", "dark": "dark.tif"},
        "solver": {"method": "admm", "iterations": 60, "tv": 1e-3, "tol": 0.0,
                   "chain_frames": 2},
        "output": {"path": "out.zarr", "time_interval_s": 0.1, "max_projections": True},
        "compute": {"scheduler": "local-cluster", "workers": 2, "frames_per_task": 2},
    }
    (folder / "job.toml").write_text(tomli_w.dumps(document))
    # The uninterrupted reference runs on threads, which is quicker to start than a cluster:
    # results never depend on [compute] (tests/pipeline/test_schedulers.py).
    (folder / "reference.toml").write_text(tomli_w.dumps({
        **document, "output": {**document["output"], "path": "reference.zarr"},
        "compute": {"scheduler": "threads", "workers": 2, "frames_per_task": 2}}))
    run_job(load_job(folder / "reference.toml"))
    return {"folder": folder, "document": document,
            "reference": read_store_arrays(folder / "reference.zarr")}


def _done_frames(store: Path) -> int:
    if not is_job_store(store):
        return 0
    try:
        return int(np.count_nonzero(zarr.open_array(store, path="diagnostics/status",
                                                    mode="r")[:] == STATUS_DONE))
    except (KeyError, FileNotFoundError, ValueError):  # still being created
        return 0


def _kill_when(store: Path, schedule: list[tuple[int, Callable[[], int]]],
               stop: threading.Event, killed: list[tuple[int, int]]) -> None:
    """For each (frames, pick) in order: once `frames` frames of `store` are done, SIGKILL the
    process whose pid `pick()` returns; append (pid, frames done at the kill) to `killed`."""
    deadline = time.monotonic() + DEADLINE_S
    for frames, pick in schedule:
        while _done_frames(store) < frames:
            if stop.is_set() or time.monotonic() > deadline:
                return
            time.sleep(0.005)
        pid = pick()
        os.kill(pid, signal.SIGKILL)
        killed.append((pid, _done_frames(store)))


def _worker_pid(parent: int, rng: np.random.Generator) -> Callable[[], int]:
    """A function picking, at random, one of the LocalCluster worker processes of `parent`
    (children started by multiprocessing's spawn, which distributed's nannies use)."""
    def pick() -> int:
        workers = sorted(child.pid for child in psutil.Process(parent).children()
                         if "spawn_main" in " ".join(child.cmdline()))
        assert len(workers) == 2, workers
        return int(rng.choice(workers))
    return pick


def test_one_worker_killed_at_seeded_moments(lost_job):
    folder, reference = lost_job["folder"], lost_job["reference"]
    job = load_job(folder / "job.toml")
    store = job.output_path
    rng = np.random.default_rng(1703)
    # Done-frame counts at which a worker dies: after the first task, before the last ones.
    moments = sorted(int(m) for m in rng.choice(np.arange(2, N_FRAMES - 3), KILL_MOMENTS,
                                                replace=False))
    for frames in moments:
        shutil.rmtree(store, ignore_errors=True)  # the killer counts this run's frames only
        killed: list[tuple[int, int]] = []
        stop = threading.Event()
        killer = threading.Thread(target=_kill_when, args=(
            store, [(frames, _worker_pid(os.getpid(), rng))], stop, killed))
        killer.start()
        try:
            result = run_job(job)
        finally:
            stop.set()
            killer.join()
        assert len(killed) == 1, f"no kill at {frames} frames"
        pid, done_at_kill = killed[0]
        assert done_at_kill < N_FRAMES  # mid-job: frames were still pending
        assert result.done == N_FRAMES and result.computed == N_FRAMES
        # Reference: the uninterrupted run of the same job; same bytes, NaN patterns included.
        image = read_store_arrays(store)
        assert np.array_equal(image["0"], reference["0"], equal_nan=True)
        assert_bit_identical(image, reference)
        assert not list(store.rglob("*.partial"))
        run = store_status(store).runs[-1]
        assert run["outcome"] == "complete" and run["lost_worker_count"] == 1, (frames, run)
        (lost,) = run["lost_workers"]
        assert lost["pid"] == pid and lost["address"].startswith("tcp://127.0.0.1:")
        assert run["started_epoch_s"] <= lost["lost_epoch_s"] <= run["ended_epoch_s"]
        shown = run_cli(["status", str(store)])
        assert shown.returncode == 0, shown.stderr
        assert (f"lost dask workers: 1 in the last run ({lost['address']} pid {pid} at "
                f"{lost['lost']})") in shown.stdout.splitlines()
    print(f"\nworker killed at {moments} done frames of {N_FRAMES}; each store bit-identical")


@pytest.fixture
def bare_scheduler(tmp_path: Path) -> Iterator[tuple[str, Callable[[], subprocess.Popen[str]]]]:
    """A tcp scheduler on loopback and a function starting a worker process for it without a
    nanny (so a killed worker stays dead, as on a node that is gone)."""
    workers: list[subprocess.Popen[str]] = []
    with LocalCluster(n_workers=0, processes=True, host="127.0.0.1", dashboard_address=None,
                      scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}) as cluster:
        address = cluster.scheduler_address

        def start_worker() -> subprocess.Popen[str]:
            child = subprocess.Popen(
                [sys.executable, "-m", "distributed.cli.dask_worker", address, "--no-nanny",
                 "--nthreads", "1", "--no-dashboard", "--host", "127.0.0.1",
                 "--local-directory", str(tmp_path / "workers")],
                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, text=True)
            workers.append(child)
            return child

        yield address, start_worker
        for child in workers:
            if child.poll() is None:
                child.kill()
            child.wait()


def test_every_worker_lost_ends_in_one_line_then_resumes(lost_job, bare_scheduler):
    folder, reference = lost_job["folder"], lost_job["reference"]
    address, start_worker = bare_scheduler
    document = dict(lost_job["document"])
    document["output"] = {**document["output"], "path": "gone.zarr"}
    document["compute"] = {**document["compute"], "scheduler": address}
    job = folder / "gone.toml"
    job.write_text(tomli_w.dumps(document))
    store = folder / "gone.zarr"

    def running_workers(n: int) -> list[subprocess.Popen[str]]:
        started = [start_worker() for _ in range(n)]
        with Client(address) as client:
            client.wait_for_workers(n, timeout=DEADLINE_S)
        return started

    first, second = running_workers(2)
    killed: list[tuple[int, int]] = []
    stop = threading.Event()
    killer = threading.Thread(target=_kill_when, args=(
        store, [(2, lambda: first.pid), (6, lambda: second.pid)], stop, killed))
    killer.start()
    # A short wait with no worker left (the default, 60 s, suits batch queues).
    env = {**os.environ, "DASK_VOLRECON__NO_WORKERS_TIMEOUT": "2s"}
    child = start_cli(["run", str(job), "--no-progress"], env=env)
    try:
        _out, err = finish(child)
    finally:
        stop.set()
        killer.join()
    assert [pid for pid, _ in killed] == [first.pid, second.pid], err
    assert child.returncode == 2, err
    line = one_error_line(err, "run")
    assert "all dask workers were lost (2 lost in this run" in line, line
    assert line.endswith("run the same command again to continue"), line
    status = store_status(store)
    assert not status.running and 6 <= status.done < N_FRAMES
    run = status.runs[-1]
    assert run["outcome"] == "error" and run["lost_worker_count"] == 2
    assert [w["pid"] for w in run["lost_workers"]] == [first.pid, second.pid]
    # The record follows the store's published JSON Schema (2020-12).
    schema = json.loads((Path(volrecon.__file__).parent / "schemas" /
                         "output-store.schema.json").read_text())
    jsonschema.validate(dict(zarr.open_group(store, mode="r").attrs), schema,
                        cls=jsonschema.Draft202012Validator)
    # Every frame marked done already holds the reference's bits.
    done = zarr.open_array(store, path="diagnostics/status", mode="r")[:] == STATUS_DONE
    volumes = zarr.open_array(store, path="0", mode="r")[...]
    assert volumes[done].tobytes() == reference["0"][done].tobytes()
    shown = run_cli(["status", str(store)])
    assert "lost dask workers: 2 in the last run" in shown.stdout, shown.stdout

    running_workers(2)
    finished = run_cli(["run", str(job), "--no-progress"], env=env)
    assert finished.returncode == 0, finished.stderr
    assert_bit_identical(read_store_arrays(store), reference)
    assert [r["outcome"] for r in store_status(store).runs] == ["error", "complete"]
    assert "lost_worker_count" not in store_status(store).runs[-1]


def test_workers_dying_on_one_task_end_in_one_error(lost_job):
    """With ``allowed-failures = 0`` one death of a worker running a task is one too many (a
    task that kills its worker, e.g. out of memory, is not retried for ever)."""
    folder, reference = lost_job["folder"], lost_job["reference"]
    document = {**lost_job["document"],
                "output": {**lost_job["document"]["output"], "path": "killed.zarr"}}
    (folder / "killed.toml").write_text(tomli_w.dumps(document))
    job = load_job(folder / "killed.toml")
    rng = np.random.default_rng(17)
    # The scheduler of a LocalCluster reads its dask config when it starts, in this process.
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        for _attempt in range(3):  # a kill between two tasks of the worker fails no task
            shutil.rmtree(job.output_path, ignore_errors=True)
            killed: list[tuple[int, int]] = []
            stop = threading.Event()
            killer = threading.Thread(target=_kill_when, args=(
                job.output_path, [(4, _worker_pid(os.getpid(), rng))], stop, killed))
            killer.start()
            try:
                run_job(job)
            except WorkersLostError as exc:
                error = exc
                break
            finally:
                stop.set()
                killer.join()
        else:
            pytest.fail("no kill landed on a running task in 3 runs")
    assert re.fullmatch(r"frames \d+:\d+: dask workers died 1 time while running their task "
                        r"\(out of memory\? distributed\.scheduler\.allowed-failures is 0\); "
                        r"frames already done are kept: .* run the same command again to "
                        r"continue", str(error)), error
    status = store_status(job.output_path)
    assert status.runs[-1]["outcome"] == "error" and status.done < N_FRAMES
    done = zarr.open_array(job.output_path, path="diagnostics/status", mode="r")[:] == (
        STATUS_DONE)
    volumes = zarr.open_array(job.output_path, path="0", mode="r")[...]
    assert done.sum() >= 4 and volumes[done].tobytes() == reference["0"][done].tobytes()


@pytest.mark.parametrize("value", ["soon", "-5s", None])
def test_bad_no_workers_timeout_refused(value):
    with dask.config.set({"volrecon.no-workers-timeout": value}), pytest.raises(
            ConfigError, match=r"dask config 'volrecon.no-workers-timeout' is .*; give a "
                               r"duration such as \"60s\""):
        no_workers_timeout_s()
    with dask.config.set({"volrecon.no-workers-timeout": "5m"}):
        assert no_workers_timeout_s() == 300.0
