"""Fixtures of the reliability tests: the pipeline tests' tiny job, a finished run of it."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import numpy as np
import pytest

# The tiny job (Gaussian PSF model, bead video, job files) is the pipeline tests' own.
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "pipeline"))

from jobdata import JobFiles, make_job_files

from volrecon.pipeline import load_job, run_job


@pytest.fixture(scope="module")
def finished_job(tmp_path_factory: pytest.TempPathFactory) -> JobFiles:
    """The pipeline tests' job files, its job file ``job.toml`` and its finished store."""
    folder = tmp_path_factory.mktemp("finished")
    files = make_job_files(folder, np.random.default_rng(20261201))
    run_job(load_job(files.write_job()))
    return files


@pytest.fixture
def job_copy(finished_job: JobFiles, tmp_path: Path) -> JobFiles:
    """A private copy of `finished_job`'s folder (inputs, job file, finished out.zarr)."""
    folder = tmp_path / "job"
    shutil.copytree(finished_job.folder, folder)
    return JobFiles(folder=folder, model=finished_job.model, raw=finished_job.raw,
                    dark=finished_job.dark)
