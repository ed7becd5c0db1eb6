"""Results never depend on [compute]: every dask scheduler writes the same bits."""

from __future__ import annotations

import numpy as np
import pytest
from distributed import LocalCluster
from jobdata import assert_bit_identical, read_store_arrays

from volrecon.backend import split_threads
from volrecon.pipeline import fft_threads_per_task, load_job, run_job


@pytest.fixture(scope="module")
def cluster():
    # Loopback only, no dashboard, HTTP server on a free port: nothing listens publicly and
    # nothing collides with another cluster on port 8787.
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None,
                      scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}) as running:
        yield running


def test_all_schedulers_bit_identical(job_files, cluster):
    base = load_job(job_files.write_job(output={"max_projections": True},
                                        compute={"scheduler": "threads", "workers": 1,
                                                 "frames_per_task": 12}))
    run_job(base)
    reference = read_store_arrays(base.output_path)
    variants = [
        {"scheduler": "threads", "workers": 2, "frames_per_task": 1},
        {"scheduler": "synchronous", "workers": 1, "frames_per_task": 5},
        {"scheduler": "processes", "workers": 2, "frames_per_task": 3},
        {"scheduler": cluster.scheduler_address, "workers": 1, "frames_per_task": 2},
        {"scheduler": "local-cluster", "workers": 2, "frames_per_task": 6},
    ]
    for compute in variants:
        job = base.with_compute(**compute)
        result = run_job(job, restart=True)
        assert result.computed == 12, compute
        # Reference: the one-worker threaded run; same bytes, NaN patterns included.
        assert_bit_identical(read_store_arrays(job.output_path), reference)
    assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")


def test_client_argument_used(job_files, cluster):
    from distributed import Client

    job = load_job(job_files.write_job())
    with Client(cluster) as client:
        result = run_job(job, client=client)
        assert result.done == 12 and client.status == "running"  # left open
    runs = __import__("zarr").open_group(job.output_path, mode="r").attrs["volrecon"]["runs"]
    assert runs[-1]["scheduler"] == "client"


def test_fft_threads_chosen_in_one_place(job_files):
    job = load_job(job_files.write_job())
    assert fft_threads_per_task(job.with_compute(workers=2).compute) == split_threads(2)
    assert fft_threads_per_task(job.with_compute(threads=3).compute) == 3
    assert fft_threads_per_task(job.with_compute(scheduler="tcp://h:1").compute) is None
    assert fft_threads_per_task(job.with_compute(scheduler="synchronous").compute) == (
        split_threads(1))
    assert np.all([split_threads(w) * w <= max(split_threads(1), w) for w in (1, 2, 3, 8)])


def test_many_waves_same_result(job_files, monkeypatch):
    from volrecon.pipeline import execute

    job = load_job(job_files.write_job(compute={"scheduler": "synchronous", "workers": 1,
                                                "frames_per_task": 12}))
    run_job(job)
    reference = read_store_arrays(job.output_path)
    # Tasks hold whole chains of chain_frames = 3: 4 tasks, here in 2 waves of 2.
    monkeypatch.setattr(execute, "WAVE_TASKS_PER_WORKER", 1)
    events = []
    run_job(job.with_compute(scheduler="threads", workers=2, frames_per_task=1), restart=True,
            progress=events.append)
    done = [e.done for e in events]  # the first: the run's start; then as frames commit
    assert done[0] == 0 and done[-1] == 12 and done == sorted(done) and len(events) >= 5
    assert_bit_identical(read_store_arrays(job.output_path), reference)


def test_process_workers_each_take_a_task():
    # dask's process scheduler batches up to 6 ready tasks per submission by default
    # ("chunksize"), which ran a whole wave on one process while the other idled.
    from dask import compute
    from dask.delayed import delayed
    from jobdata import sleep_then_pid

    from volrecon.pipeline.config import ComputeSettings
    from volrecon.pipeline.execute import open_local_scheduler

    with open_local_scheduler(ComputeSettings(scheduler="processes", workers=2),
                              name="test") as kwargs:
        pids = compute(*[delayed(sleep_then_pid, pure=False)(2.0) for _ in range(2)],
                       **kwargs)
    assert len(set(pids)) == 2
