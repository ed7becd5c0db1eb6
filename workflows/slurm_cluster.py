"""Run a volrecon job on a SLURM cluster through dask-jobqueue.

    python workflows/slurm_cluster.py workflows/cluster.toml --jobs 10 --queue normal \
        --account mylab --venv /shared/lab/volrecon/.venv

This process is the driver: it holds the store's lock, plans tasks and records finished
frames; it starts a dask scheduler here and submits SLURM jobs that each run dask workers.
Run it on a login node or inside a small long-running SLURM job (the scheduler must be
reachable from the compute nodes: pick their network with --interface, e.g. ib0). Stopping
it (Ctrl-C, or SIGTERM from the queue) leaves a consistent store; run it again to continue.
"""

from __future__ import annotations

import argparse
import signal
import sys
from typing import Any


def slurm_cluster(*, cores: int, processes: int, memory: str, walltime: str,
                  queue: str | None = None, account: str | None = None,
                  venv: str | None = None, interface: str | None = None,
                  extra_directives: list[str] | None = None, log_directory: str = "slurm-logs",
                  scheduler_options: dict[str, Any] | None = None) -> Any:
    """A dask-jobqueue SLURMCluster whose jobs each run `processes` dask workers."""
    from dask_jobqueue import SLURMCluster

    prologue = [f"source {venv}/bin/activate"] if venv else []
    # Each worker process runs cores/processes tasks at once, one FFT thread each
    # ([compute] threads = 1); keep other libraries from starting thread pools of their own.
    prologue += ["export OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1"]
    return SLURMCluster(
        cores=cores, processes=processes, memory=memory, walltime=walltime, queue=queue,
        account=account, interface=interface, job_script_prologue=prologue,
        job_extra_directives=extra_directives or [], local_directory="$TMPDIR",
        log_directory=log_directory, scheduler_options=scheduler_options or {})


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("job", help="job file (paths on shared storage)")
    parser.add_argument("--jobs", type=int, default=4, help="SLURM jobs to start")
    parser.add_argument("--cores", type=int, default=8, help="cores per SLURM job")
    parser.add_argument("--processes", type=int, default=2, help="dask workers per SLURM job")
    parser.add_argument("--memory", default="32GiB", help="memory per SLURM job")
    parser.add_argument("--walltime", default="04:00:00")
    parser.add_argument("--queue", default=None)
    parser.add_argument("--account", default=None)
    parser.add_argument("--venv", default=None, help="virtual environment on shared storage")
    parser.add_argument("--interface", default=None, help="network interface, e.g. ib0")
    parser.add_argument("--adapt", action="store_true",
                        help="scale between 0 and --jobs SLURM jobs as work remains")
    parser.add_argument("--restart", action="store_true", help="start the store over")
    args = parser.parse_args(argv)

    from distributed import Client

    from volrecon.pipeline import load_job, progress_bar, run_job

    job = load_job(args.job)  # check the job before asking the queue for anything
    cluster = slurm_cluster(cores=args.cores, processes=args.processes, memory=args.memory,
                            walltime=args.walltime, queue=args.queue, account=args.account,
                            venv=args.venv, interface=args.interface)

    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, stop)
    try:
        with cluster, Client(cluster) as client:
            if args.adapt:
                cluster.adapt(minimum_jobs=0, maximum_jobs=args.jobs)
            else:
                cluster.scale(jobs=args.jobs)
            client.wait_for_workers(1)
            with progress_bar() as progress:
                result = run_job(job, restart=args.restart, progress=progress, client=client)
    except KeyboardInterrupt:
        print("stopped; run the same command again to continue", file=sys.stderr)
        return 130
    print(f"{result.store_path}: {result.done}/{result.total} frames done, "
          f"{result.failed} failed")
    return 0


if __name__ == "__main__":
    sys.exit(main())
