"""Fixtures of the napari tests (helpers in napari_stores.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from napari_stores import (
    DEPTH_START_UM,
    SCALE_TZYX,
    SHAPE_ZYX,
    OutputStore,
    gaussian_psf,
    make_output_store,
)

import volrecon


@pytest.fixture
def output_store(tmp_path: Path, rng: np.random.Generator) -> OutputStore:
    """A half-finished output store with projections."""
    return make_output_store(tmp_path / "volumes.zarr", rng)


@pytest.fixture
def volrecon_plugin(npe2pm):
    """npe2's test plugin manager (no discovery) with the installed volrecon manifest."""
    from npe2 import PluginManifest

    npe2pm.register(PluginManifest.from_distribution("volrecon"))
    return npe2pm


@pytest.fixture
def model_store(tmp_path: Path) -> Path:
    """A full-rank (depth-convolution) PSF model store of the output store's grid."""
    model = volrecon.PSFModel.from_stack(gaussian_psf(SHAPE_ZYX), depth_step_um=SCALE_TZYX[1],
                                         pixel_size_um=SCALE_TZYX[2],
                                         depth_start_um=DEPTH_START_UM)
    path = tmp_path / "model.zarr"
    model.save(path)
    return path
