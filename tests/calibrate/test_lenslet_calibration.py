"""Calibration of a (Z, N, N, Y, X) lenslet scan, from arrays and through the CLI."""

from __future__ import annotations

import numpy as np
import pytest
import tifffile
from scipy.ndimage import gaussian_filter

from volrecon.calibrate import calibrate_lenslet_stack
from volrecon.cli import main
from volrecon.errors import DataError, ShapeError
from volrecon.models import Geometry, LensletPSF, PSFModel


def _true_stack(rng, nz=3, n=2, ny=24, nx=24):
    """Blurred spots near each sub-position; sub-position (1, 1) half as bright."""
    y0, x0 = n * ((ny // 2) // n), n * ((nx // 2) // n)
    psf = np.zeros((nz, n, n, ny, nx))
    for z in range(nz):
        for i in range(n):
            for j in range(n):
                for dy, dx in rng.integers(-5, 6, (2, 2)):
                    psf[z, i, j, y0 + i + dy, x0 + j + dx] += 1.0
    psf = gaussian_filter(psf, sigma=(0, 0, 0, 1.0, 1.0))
    psf /= psf.sum(axis=(-2, -1), keepdims=True)
    psf[:, 1, 1] *= 0.5
    return psf


def _camera(rng, psf, photons=2e5, offset=100.0):
    return rng.poisson(psf * photons + offset).astype(np.uint16)


def test_cleaned_model_matches_the_true_responses(rng):
    truth = _true_stack(rng)
    model = calibrate_lenslet_stack(_camera(rng, truth), lenslet_pitch=2, depth_step_um=2.0,
                                    pixel_size_um=0.5)
    assert isinstance(model, LensletPSF) and model.psf.shape == truth.shape
    # Known truth: the responses the scan was made of, scaled to the brightest one (sum 1).
    expected = truth / truth.sum(axis=(-2, -1)).max()
    error = np.linalg.norm(model.psf - expected) / np.linalg.norm(expected)
    # 2e5 photons per image: shot noise over the ~100-pixel support is about 1 % of the
    # light; the background mask and clip add a little more.
    assert error < 0.05
    throughput = np.asarray(model.calibration["throughput"]).reshape(2, 2, 3)
    np.testing.assert_allclose(throughput[1, 1], 0.5, atol=0.02)
    np.testing.assert_allclose(throughput[0, 0], 1.0, atol=0.02)


@pytest.mark.parametrize("shape, pitch, error, match", [
    ((3, 2, 2, 24, 24), 3, ShapeError, r"\(Z, 3, 3, Y, X\)"),
    ((3, 24, 24), 2, ShapeError, r"\(Z, 2, 2, Y, X\)"),
])
def test_wrong_shapes_are_refused(shape, pitch, error, match):
    with pytest.raises(error, match=match):
        calibrate_lenslet_stack(np.ones(shape), lenslet_pitch=pitch, depth_step_um=1.0,
                                pixel_size_um=1.0)


def test_bad_sub_position_is_named(rng):
    scan = _camera(rng, _true_stack(rng)).astype(np.float64)
    scan[1, 0, 1, 3, 3] = np.nan
    with pytest.raises(DataError, match=r"sub-position \(0, 1\)"):
        calibrate_lenslet_stack(scan, lenslet_pitch=2, depth_step_um=1.0, pixel_size_um=1.0)


def test_cli_writes_a_lenslet_model(rng, tmp_path, capsys):
    scan = tmp_path / "lf.tif"
    tifffile.imwrite(scan, _camera(rng, _true_stack(rng)), photometric="minisblack")
    out = tmp_path / "lf.zarr"
    status = main(["calibrate", str(scan), "--lenslet-pitch", "2", "--depth-step", "2",
                   "--pixel-size", "0.5", "--out", str(out)])
    assert status == 0 and f"model written to {out}" in capsys.readouterr().out
    model = PSFModel.load(out)
    assert isinstance(model, LensletPSF) and model.shape_in == (3, 24, 24)
    assert model.calibration["source"] == str(scan)
    status = main(["calibrate", str(scan), "--lenslet-pitch", "2", "--depth-step", "2",
                   "--pixel-size", "0.5", "--rank", "2", "--out", str(tmp_path / "x.zarr")])
    err = capsys.readouterr().err
    assert status == 2 and "does not take --rank" in err and len(err.strip().splitlines()) == 1


def test_simulated_scan_calibrates_to_its_true_responses(tmp_path):
    from volrecon.calibrate import calibrate_lenslet_file
    from volrecon.simulate.lenslet import LensletDesign
    from volrecon.simulate.scenario import write_lenslet_scenario

    design = LensletDesign(shape_yx=(32, 32), lenslet_pitch=4, wavelength_samples=1,
                           bandwidth_um=0.0)
    scenario = write_lenslet_scenario(tmp_path / "raw", design=design, n_frames=1,
                                      n_planes=3, n_beads=2, dark_frames=4, workers=1)
    model = calibrate_lenslet_file(
        scenario.files["psf_scan"], tmp_path / "model", lenslet_pitch=4,
        depth_step_um=scenario.depth_step_um, pixel_size_um=scenario.pixel_size_um,
        depth_start_um=scenario.depth_start_um, dark_path=scenario.files["dark"])
    truth = np.load(scenario.files["truth_psf"])
    assert model.psf.shape == truth.shape
    # Known synthetic truth: the noise-free wave-optics responses. Each cleaned image has
    # the shape of its true response (0.95: shot and read noise, and the faint far tails
    # the background mask removes) and the calibration keeps the light per sub-position
    # and depth relative to the brightest (textbook: the emitter's light in the objective's
    # cone is the same at every in-field sub-position, so all are within a few per cent).
    for z in range(3):
        for i in range(4):
            for j in range(4):
                r = np.corrcoef(model.psf[z, i, j].ravel(), truth[z, i, j].ravel())[0, 1]
                assert r > 0.95, (z, i, j, r)
    throughput = np.asarray(model.calibration["throughput"])
    assert throughput.shape == (16, 3) and throughput.min() > 0.9


# Width growth per depth plane for each sub-position (i, j): 1.0 never decorrelates.
_GROWTH = np.array([[1.5, 1.8], [1.4, 1.0]])


def _gaussian_stack(nz=5, n=2, size=160):
    """Unit-sum Gaussian spots on each sub-position, width 1.4 px × growth**z (at most
    14.7 px: over five widths inside the frame, so the spot is not truncated)."""
    y0 = n * ((size // 2) // n)
    yy, xx = np.mgrid[:size, :size]
    psf = np.zeros((nz, n, n, size, size))
    widths = 1.4 * _GROWTH[None] ** np.arange(nz)[:, None, None]  # (Z, N, N)
    for z in range(nz):
        for i in range(n):
            for j in range(n):
                r2 = (yy - y0 - i) ** 2 + (xx - y0 - j) ** 2
                spot = np.exp(-r2 / (2 * widths[z, i, j] ** 2))
                psf[z, i, j] = spot / spot.sum()
    return psf, widths


def test_report_depth_correlation_matches_the_gaussian_closed_form():
    from volrecon.calibrate.lenslet_report import lenslet_report
    from volrecon.calibrate.metrics import axial_resolution

    psf, widths = _gaussian_stack()
    nz, n, _, size, _ = psf.shape
    model = LensletPSF(psf, Geometry(2.0, 0.5))
    report = lenslet_report(model)
    assert report.depth_ncc.shape == (n, n, nz, nz)
    pixels = size * size
    for i in range(n):
        for j in range(n):
            s = widths[:, i, j]
            # Textbook Gaussian integral: two unit-sum 2-D Gaussians of widths s1, s2 on one
            # centre overlap by 1 / (2π(s1² + s2²)), so their NCC is 2 s1 s2 / (s1² + s2²).
            # depth_correlation first subtracts each plane's mean (1 / pixels), which takes
            # 1 / pixels off every inner product. The sampled sums equal the integrals to
            # ~exp(-2π² σ²) with σ² = s1² s2² / (s1² + s2²) ≥ 0.98 here (Poisson summation),
            # far below the ~1e-6 of the float32 transforms.
            overlap = 1.0 / (2 * np.pi * (s[:, None] ** 2 + s[None, :] ** 2)) - 1.0 / pixels
            expected = overlap / np.sqrt(np.outer(np.diag(overlap), np.diag(overlap)))
            np.testing.assert_allclose(report.depth_ncc[i, j], expected, atol=1e-5)
            np.testing.assert_allclose(report.neighbour_ncc[i, j],
                                       np.diag(expected, k=1), atol=1e-5)
            # The rule of the other kinds' report applied to the closed-form correlations.
            _, median = axial_resolution(expected, 2.0)
            if median is None:
                assert np.isnan(report.distinguishable_planes[i, j])
            else:
                assert report.distinguishable_planes[i, j] == pytest.approx(
                    max(1.0, nz * 2.0 / median), rel=1e-4)
    # Faster width growth separates more depths; constant width none.
    planes = report.distinguishable_planes
    assert planes[0, 1] > planes[0, 0] > planes[1, 0] and np.isnan(planes[1, 1])


def test_cli_writes_the_lenslet_report(tmp_path, capsys):
    import json

    psf, _ = _gaussian_stack(nz=3)
    scan = tmp_path / "lf.tif"
    tifffile.imwrite(scan, (psf * 2e5 + 100).astype(np.uint16), photometric="minisblack")
    out = tmp_path / "lf.zarr"
    assert main(["calibrate", str(scan), "--lenslet-pitch", "2", "--depth-step", "2",
                 "--pixel-size", "0.5", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "distinguishable depths" in text and "lf.report" in text
    data = json.loads((tmp_path / "lf.report" / "report.json").read_text())
    assert data["model_kind"] == "lenslet" and data["lenslet_pitch"] == 2
    assert np.asarray(data["depth_ncc"]).shape == (2, 2, 3, 3)
    assert data["calibration"]["source"] == str(scan)
    assert (tmp_path / "lf.report" / "summary.txt").read_text().startswith("PSF model: lenslet")
    # A folder in the report's place that is not a report is refused in one line.
    (tmp_path / "other.report").mkdir()
    assert main(["calibrate", str(scan), "--lenslet-pitch", "2", "--depth-step", "2",
                 "--pixel-size", "0.5", "--out", str(tmp_path / "other.zarr")]) == 2
    err = capsys.readouterr().err
    assert "not a calibration report" in err and len(err.strip().splitlines()) == 1
