"""Fixtures of the pipeline tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from jobdata import JobFiles, make_job_files


@pytest.fixture
def job_files(tmp_path: Path, rng: np.random.Generator) -> JobFiles:
    """Model store, 12-frame raw TIFF and dark frame in `tmp_path`."""
    return make_job_files(tmp_path, rng)
