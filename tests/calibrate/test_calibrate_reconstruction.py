"""A calibrated model reconstructs as well as the clean PSF it was measured from."""

from __future__ import annotations

import numpy as np
import pytest

import volrecon
from volrecon.calibrate import calibrate_stack
from volrecon.models import PSFModel


@pytest.mark.parametrize("rank", [None, "auto"])
def test_calibrated_model_reconstructs_like_the_clean_psf(rng, speckle, camera, rank):
    z, n = 8, 48
    psf = speckle(rng, z, n, defocus_rad=12.0)
    clean = PSFModel.from_stack(psf.astype(np.float32), 2.0, 0.5)
    truth = np.zeros((z, n, n), np.float32)
    for _ in range(8):  # beads at known voxels, away from the edges
        truth[rng.integers(0, z), rng.integers(8, n - 8), rng.integers(8, n - 8)] += 1.0
    frame = clean.forward(truth)
    # The bead scan: offset 100 counts, Poisson noise on 1e6 photons per plane, hot pixels,
    # and 8 dark frames with the same offset and hot pixels.
    raw, dark = camera(rng, psf, photons=1e6, offset=100.0, hot=4)
    result = calibrate_stack(raw, dark=dark, depth_step_um=2.0, pixel_size_um=0.5, rank=rank)
    if rank == "auto":
        assert result.model.kind == "depth-low-rank" and result.model.rank < z
    options = {"method": "admm", "iterations": 300, "tol": 0.0, "l1": 1e-4}
    reference = volrecon.reconstruct(frame, clean, **options)
    calibrated = volrecon.reconstruct(frame, result.model, **options)
    error_clean = np.linalg.norm(reference - truth) / np.linalg.norm(truth)
    error_calibrated = np.linalg.norm(calibrated - truth) / np.linalg.norm(truth)
    # Known synthetic truth: the bead volume. "Within a few percent" (the issue): the two
    # reconstructions differ by < 3 % and their errors against the truth by < 2 points
    # (measured ~1 % and ~0.3 points; noise in the scan and the truncation set the gap).
    assert error_clean < 0.15
    assert np.linalg.norm(calibrated - reference) / np.linalg.norm(reference) < 0.03
    assert abs(error_calibrated - error_clean) < 0.02
