"""The streaming job: job file, task planning, dask execution, checkpoints, lock, progress."""

from volrecon.pipeline.config import (
    ComputeSettings,
    JobConfig,
    SolverSettings,
    job_from_dict,
    load_job,
)
from volrecon.pipeline.execute import fft_threads_per_task
from volrecon.pipeline.export import export_tiff
from volrecon.pipeline.job import JobProgress, JobResult, prepare_job, run_job
from volrecon.pipeline.lock import StoreLock
from volrecon.pipeline.plan import plan_tasks
from volrecon.pipeline.progress import progress_bar
from volrecon.pipeline.status import StoreStatus, format_status, store_status
from volrecon.pipeline.store import JobStore

__all__ = [
    "ComputeSettings",
    "JobConfig",
    "JobProgress",
    "JobResult",
    "JobStore",
    "SolverSettings",
    "StoreLock",
    "StoreStatus",
    "export_tiff",
    "fft_threads_per_task",
    "format_status",
    "job_from_dict",
    "load_job",
    "plan_tasks",
    "prepare_job",
    "progress_bar",
    "run_job",
    "store_status",
]
