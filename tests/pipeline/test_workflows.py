"""The ready-made workflows: their job files pass the schema, the SLURM script writes a job."""

from __future__ import annotations

import runpy
from pathlib import Path

import pytest

from volrecon.pipeline import load_job

WORKFLOWS = Path(__file__).resolve().parents[2] / "workflows"


@pytest.mark.parametrize("name", ["workstation.toml", "cluster.toml"])
def test_workflow_job_files_validate(name):
    job = load_job(WORKFLOWS / name)
    assert job.solver.method == "admm" and job.time_interval_s == 0.05
    assert job.model_path.is_absolute()


def test_slurm_script_generates_a_worker_job(tmp_path):
    module = runpy.run_path(str(WORKFLOWS / "slurm_cluster.py"), run_name="workflow")
    # Loopback scheduler and a free HTTP port so the test listens nowhere public.
    cluster = module["slurm_cluster"](
        cores=8, processes=2, memory="32GiB", walltime="02:00:00", queue="gpu",
        account="mylab", venv="/shared/venv", log_directory=str(tmp_path / "logs"),
        scheduler_options={"host": "127.0.0.1", "dashboard_address": "127.0.0.1:0"})
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    # Expected directives: dask-jobqueue's SLURM template (cores -> --cpus-per-task, ...).
    for line in ("#SBATCH -p gpu", "#SBATCH -A mylab", "#SBATCH --cpus-per-task=8",
                 "#SBATCH -t 02:00:00", "source /shared/venv/bin/activate"):
        assert line in script
    assert "--nworkers 2" in script and "--nthreads 4" in script
