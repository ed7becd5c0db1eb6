"""calibrate_stack end to end on synthetic scans: single position and several field positions."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.calibrate import calibrate_stack
from volrecon.errors import ConfigError, DataError, ShapeError
from volrecon.models import DepthConvolutionPSF, FieldVaryingPSF, LowRankDepthPSF


def _corr(a, b):
    return float(np.corrcoef(np.ravel(a), np.ravel(b))[0, 1])


def test_full_rank_model_is_the_cleaned_stack(rng, gaussian, camera):
    psf = gaussian(6, 40)
    raw, _ = camera(rng, psf, photons=1e5)
    result = calibrate_stack(raw, depth_step_um=2.0, pixel_size_um=0.5, depth_start_um=-5.0)
    assert isinstance(result.model, DepthConvolutionPSF)
    np.testing.assert_array_equal(result.model.psf_zyx, result.psf_zyx)
    np.testing.assert_allclose(result.model.depths_um, -5.0 + 2.0 * np.arange(6))
    report = result.report
    assert report.rank == 6 and report.retained_energy == pytest.approx(1.0)
    # Known truth: each plane recovered (issue criterion, Pearson >= 0.95).
    assert min(_corr(a, b) for a, b in zip(result.psf_zyx, psf, strict=True)) >= 0.95


@pytest.mark.parametrize("rank", [2, "auto"])
def test_low_rank_model_and_its_metadata(rng, gaussian, camera, rank):
    psf = gaussian(8, 40, rayleigh_planes=5.0)
    raw, _ = camera(rng, psf, photons=2e5)
    result = calibrate_stack(raw, depth_step_um=1.0, pixel_size_um=0.5, rank=rank,
                             energy=0.99, wavelength_nm=520.0)
    model = result.model
    assert isinstance(model, LowRankDepthPSF) and model.rank < 8
    if rank == 2:
        assert model.rank == 2
    # Reference: numpy.linalg.svd of the cleaned stack — the model is its best rank-r
    # approximation (Eckart–Young), so the expanded stack misses exactly the tail energy.
    s = np.linalg.svd(result.psf_zyx.reshape(8, -1).astype(np.float64), compute_uv=False)
    missing = np.linalg.norm(model.expanded_stack() - result.psf_zyx)
    assert missing == pytest.approx(np.sqrt(np.sum(s[model.rank:] ** 2)), rel=1e-3)
    meta = model.calibration
    assert meta["rank"] == model.rank and meta["wavelength_nm"] == 520.0
    assert len(meta["throughput"][0]) == 8 and "depth_ncc" not in meta


def test_crop_and_bin_move_positions_consistently(rng, gaussian, camera):
    # A bead imaged at raw pixel (24, 24); after cropping 4 rows/columns and binning by 2,
    # binned pixel i covers raw i*2+4 .. i*2+5, so the bead sits at (24 - 4 - 0.5) / 2.
    psf = gaussian(2, 48, centre=(24.0, 24.0))
    raw, _ = camera(rng, psf, photons=1e5)
    result = calibrate_stack(raw, depth_step_um=1.0, pixel_size_um=0.3, crop_yx=(4, 44, 4, 44),
                             bin_factor=2)
    assert result.model.shape_in == (2, 20, 20)
    assert result.model.geometry.pixel_size_um == pytest.approx(0.6)
    yy, xx = np.mgrid[:20, :20]
    plane = result.psf_zyx[0]
    # Known truth: the intensity centroid of a symmetric bead image.
    centroid = (float((plane * yy).sum() / plane.sum()), float((plane * xx).sum() / plane.sum()))
    np.testing.assert_allclose(centroid, (9.75, 9.75), atol=0.05)


def _two_spot_psf(z, n, width, spread):
    yy, xx = np.mgrid[:n, :n]
    c = n // 2
    planes = []
    for i in range(z):
        w = width * (1 + 0.3 * i)
        planes.append(np.exp(-((yy - c) ** 2 + (xx - c) ** 2) / (2 * w**2))
                      + 0.6 * np.exp(-((yy - c - spread) ** 2 + (xx - c + 2) ** 2) / (2 * w**2)))
    stack = np.array(planes)
    return stack / stack.sum(axis=(1, 2), keepdims=True)


def _shift(stack, dy, dx):
    from volrecon.calibrate import shift_image

    return np.clip(shift_image(stack, (dy, dx)), 0, None)


def test_field_positions_registered_centred_and_blended(rng):
    z, n = 3, 48
    c = n // 2
    positions = np.array([[24.0, 24.0], [14.0, 33.0], [33.5, 13.0]])
    centred = [_two_spot_psf(z, n, 1.3 + 0.25 * k, 3 + k) for k in range(3)]
    scans = np.stack([rng.poisson(1e5 * _shift(centred[k], *(positions[k] - c)) + 50)
                      for k in range(3)]).astype(np.uint16)
    nominal = positions.copy()
    nominal[2] += (1.5, 0.0)  # the stage log is off by 1.5 px for the last position
    result = calibrate_stack(scans, depth_step_um=2.0, pixel_size_um=0.5, positions_yx=nominal)
    model, report = result.model, result.report
    assert isinstance(model, FieldVaryingPSF) and model.n_kernels == 3
    assert report.reference_position == 0
    # Known truth: scan k is the reference pattern moved by positions[k] - positions[0], so
    # the registering shift is the opposite (the patterns also change across the field:
    # 0.25 px).
    np.testing.assert_allclose(report.registration_shifts_yx,
                               -(positions - positions[0]), atol=0.25)
    # Known truth: the nominal position of scan 2 is 1.5 px off in y.
    np.testing.assert_allclose(report.position_residuals_yx[2], (-1.5, 0.0), atol=0.25)
    for k in range(3):
        # Known truth: each kernel is that position's PSF on the sensor centre
        # (issue criterion, Pearson >= 0.95 per plane).
        for plane in range(z):
            assert _corr(model.kernels_zkyx[plane, k], centred[k][plane]) >= 0.95
    # At the reference position the blended PSF is that position's own kernel.
    np.testing.assert_allclose(model.psf_at(24, 24), model.kernels_zkyx[:, 0], atol=1e-6)


@pytest.mark.parametrize("stack, kwargs, error, match", [
    (np.ones((8, 8)), {}, ShapeError, "single 2-D image"),
    (np.ones((1, 2, 3, 8, 8)), {}, ShapeError, r"\(Z, Y, X\) or \(K, Z, Y, X\)"),
    (np.ones((3, 8, 8)), {"positions_yx": [[4, 4]]}, ConfigError, "--positions needs"),
    (np.ones((2, 3, 8, 8)), {}, ConfigError, "pass --positions"),
    (np.ones((2, 3, 8, 8)), {"positions_yx": [[4, 4], [3, 3]], "rank": 2}, ConfigError,
     "drop --rank"),
    (np.ones((3, 8, 8)), {"rank": 4}, ConfigError, "larger than the number of depth planes"),
    (np.ones((3, 8, 8)), {"depth_step_um": 0.0}, ConfigError, "--depth-step"),
    (np.ones((3, 8, 8)), {"depth_step_um": -1.0}, ConfigError, "--depth-step"),
    (np.ones((3, 8, 8)), {"pixel_size_um": float("nan")}, ConfigError, "--pixel-size"),
    (np.ones((3, 8, 8)), {"depth_start_um": float("inf")}, ConfigError, "--depth-start"),
    (np.ones((3, 8, 8)), {"bin_factor": 0}, ConfigError, "--bin"),
    (np.ones((3, 8, 8)), {"wavelength_nm": -500.0}, ConfigError, "--wavelength"),
    (np.ones((3, 8, 8)), {"energy": 1.2}, ConfigError, "--energy"),
    (np.ones((3, 8, 8)), {"rank": 0}, ConfigError, "--rank"),
    (np.ones((3, 8, 8)), {"rank": "some"}, ConfigError, "--rank"),
    (np.ones((2, 3, 8, 8)), {"positions_yx": [[4, 4]]}, ShapeError, "2 rows"),
    (np.ones((2, 3, 8, 8)), {"positions_yx": [[4, 4], [np.nan, 1]]}, DataError, "NaN"),
])
def test_bad_input_is_refused(stack, kwargs, error, match):
    options = {"depth_step_um": 1.0, "pixel_size_um": 1.0, **kwargs}
    with pytest.raises(error, match=match):
        calibrate_stack(stack, **options)


def test_error_in_one_field_position_names_it(rng, gaussian, camera):
    raw, _ = camera(rng, gaussian(3, 24), photons=1e4)
    scans = np.stack([raw, raw.copy()])
    scans[1, 2] = 0
    with pytest.raises(DataError, match=r"field position 1: plane 2 .* all zero"):
        calibrate_stack(scans, depth_step_um=1.0, pixel_size_um=1.0,
                        positions_yx=[[12, 12], [12, 13]])
