"""The model keeps the instrument's throughput per depth; implausible sizes are warned about."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import tifffile

from volrecon.calibrate import calibrate_stack, clean_psf_stack
from volrecon.cli import main
from volrecon.errors import ConfigError, UnitWarning
from volrecon.models import DepthConvolutionPSF, PSFModel

#: Known truth: the bead's brightness falls linearly to 0.4 with depth.
FALLING = np.linspace(1.0, 0.4, 6)


def _falling_scan(rng, gaussian, camera):
    return camera(rng, gaussian(6, 40) * FALLING[:, None, None], photons=1e5)[0]


def test_throughput_kept_in_every_model_kind(rng, gaussian, camera, tmp_path):
    raw = _falling_scan(rng, gaussian, camera)
    for rank in (None, 2):
        result = calibrate_stack(raw, depth_step_um=2.0, pixel_size_um=0.5, rank=rank)
        planes = (result.model.psf_zyx if rank is None
                  else result.model.expanded_stack())
        sums = planes.sum(axis=(1, 2))
        # Known truth: 1 → 0.4. Poisson noise on 1e5 photons and the masked faint tails
        # leave about 1 %; rank 2 of 6 planes another ~1 % (its retained energy is 99.9 %).
        np.testing.assert_allclose(sums / sums.max(), FALLING, rtol=0.03)
        path = tmp_path / f"model{rank}"
        result.model.save(path)
        stored = PSFModel.load(path).calibration  # type: ignore[attr-defined]
        np.testing.assert_allclose(stored["throughput"][0], FALLING, rtol=0.03)
        assert stored["normalization"] == "stack"
    assert isinstance(calibrate_stack(raw, depth_step_um=2.0, pixel_size_um=0.5).model,
                      DepthConvolutionPSF)
    assert "kept in the model" in result.report.summary_text()


def test_field_positions_keep_their_relative_throughput(rng, gaussian, camera):
    # Known truth: the second field position collects half the light (vignetting).
    scans = np.stack([camera(rng, gaussian(3, 32) * scale, photons=1e5)[0]
                      for scale in (1.0, 0.5)])
    result = calibrate_stack(scans, depth_step_um=1.0, pixel_size_um=0.5,
                             positions_yx=[[16, 16], [10, 20]])
    sums = result.psf_zyx.sum(axis=(2, 3))
    np.testing.assert_allclose(sums[1] / sums[0], 0.5, rtol=0.03)
    # The stored throughput is what the kernels carry, up to the registration's sub-pixel
    # shift and clip at zero (a few 1e-4 of each sum).
    np.testing.assert_allclose(result.model.calibration["throughput"], sums, rtol=1e-3)


def test_normalise_planes_gives_unit_sums(rng, gaussian, camera, tmp_path, capsys):
    scan = tmp_path / "scan.tif"
    tifffile.imwrite(scan, _falling_scan(rng, gaussian, camera), photometric="minisblack")
    out = tmp_path / "planes.zarr"
    assert main(["calibrate", str(scan), "--depth-step", "2", "--pixel-size", "0.5",
                 "--normalise-planes", "--out", str(out)]) == 0
    assert "normalised to unit sum one by one" in capsys.readouterr().out
    model = PSFModel.load(out)
    np.testing.assert_allclose(model.psf_zyx.sum(axis=(1, 2)), 1.0, rtol=1e-5)
    # The throughput is still measured and stored.
    np.testing.assert_allclose(model.calibration["throughput"][0], FALLING, rtol=0.03)
    assert model.calibration["normalization"] == "planes"


def test_normalisation_options(rng, gaussian, camera):
    raw = _falling_scan(rng, gaussian, camera)
    with pytest.raises(ConfigError, match="normalization must be one of stack, planes, none"):
        clean_psf_stack(raw, normalization="total")
    with pytest.warns(FutureWarning, match="use normalization='planes'"):
        cleaned = clean_psf_stack(raw, normalize=True)
    assert cleaned.normalization == "planes"


@pytest.mark.parametrize(("option", "value", "hint"), [
    ("pixel_size_um", 800.0, r"--pixel-size \(pixel_size_um\) is 800 um.*use 0\.8"),
    ("pixel_size_um", 0.0065, r"is 0\.0065 um.*millimetres, use 6\.5"),
    ("depth_step_um", 500.0, r"--depth-step \(depth_step_um\) is 500 um.*use 0\.5"),
])
def test_implausible_sizes_warned_about(rng, gaussian, camera, option, value, hint):
    raw = camera(rng, gaussian(2, 24), photons=1e5)[0]
    sizes = {"pixel_size_um": 0.5, "depth_step_um": 2.0, option: value}
    with pytest.warns(UnitWarning, match=hint):
        calibrate_stack(raw, **sizes)


def test_plausible_sizes_are_silent(rng, gaussian, camera):
    raw = camera(rng, gaussian(2, 24), photons=1e5)[0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for pixel, step in ((0.05, 0.05), (50.0, 100.0)):  # the edges of the ranges
            calibrate_stack(raw, depth_step_um=step, pixel_size_um=pixel)
