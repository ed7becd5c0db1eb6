"""Fixtures of the pipeline tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile
from jobdata import N_FRAMES, SHAPE_ZYX, JobFiles, bead_video, gaussian_psf

import volrecon


@pytest.fixture
def job_files(tmp_path: Path, rng: np.random.Generator) -> JobFiles:
    """Model store, 12-frame raw TIFF and dark frame in `tmp_path`."""
    model = volrecon.PSFModel.from_stack(gaussian_psf(SHAPE_ZYX), depth_step_um=2.0,
                                         pixel_size_um=0.65)
    model.save(tmp_path / "model")
    raw = bead_video(model, N_FRAMES, rng)
    tifffile.imwrite(tmp_path / "raw.tif", raw, photometric="minisblack")
    dark = np.full(raw.shape[1:], 100, np.uint16)
    tifffile.imwrite(tmp_path / "dark.tif", dark, photometric="minisblack")
    return JobFiles(folder=tmp_path, model=volrecon.PSFModel.load(tmp_path / "model"),
                    raw=raw, dark=dark)
