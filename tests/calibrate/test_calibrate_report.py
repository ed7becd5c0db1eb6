"""The calibration report: files, JSON content, text, and the no-matplotlib fallback."""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest

from volrecon.calibrate import calibrate_stack


@pytest.fixture
def report(rng, speckle, camera):
    raw, dark = camera(rng, speckle(rng, 8, 40), photons=3e5)
    return calibrate_stack(raw, dark=dark, depth_step_um=2.0, pixel_size_um=0.5, rank="auto",
                           wavelength_nm=600.0).report


def test_writes_text_json_and_plots(report, tmp_path):
    written = report.write(tmp_path / "r")
    names = sorted(p.split("/")[-1] for p in written.files)
    assert names == sorted(["summary.txt", "report.json", "singular_values.png", "throughput.png",
                            "depth_correlation.png", "lateral_resolution.png",
                            "registration.png"])
    for name in names:
        if name.endswith(".png"):
            # Known truth: the PNG signature (RFC 2083).
            assert (tmp_path / "r" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    data = json.loads((tmp_path / "r" / "report.json").read_text())
    assert data["rank"] == report.rank and len(data["depth_ncc"]) == 8
    assert "common-practice" in data["axial_resolution_criterion"]
    text = (tmp_path / "r" / "summary.txt").read_text()
    assert "axial resolution" in text and "common-practice criterion" in text
    assert "Airy-equivalent NA at 600 nm" in text


def test_figures_are_consistent(report):
    # Known truth: the speckle planes decorrelate within the 16 µm scan, so the axial
    # resolution is a finite distance shorter than the scan, and at least one depth is
    # distinguishable; the NCC matrix is symmetric with a unit diagonal (definition of a
    # normalised cross-correlation).
    assert report.axial_resolution_um is not None and 0 < report.axial_resolution_um < 16
    assert report.distinguishable_planes is not None and report.distinguishable_planes >= 1
    np.testing.assert_allclose(report.depth_ncc, report.depth_ncc.T)
    np.testing.assert_allclose(np.diag(report.depth_ncc), 1.0)


FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def test_figures_of_a_gaussian_stack_match_closed_forms(rng, gaussian, camera):
    z, pixel_um = 9, 0.5
    raw, dark = camera(rng, gaussian(z, 40), photons=5e5)
    calibration = calibrate_stack(raw, dark=dark, depth_step_um=2.0, pixel_size_um=pixel_um,
                                  rank="auto")
    report = calibration.report
    # The stack's widths: σ(z) = 1.4 px · sqrt(1 + (dz / 3 planes)²) (conftest.gaussian_stack).
    sigma_px = 1.4 * np.sqrt(1 + ((np.arange(z) - (z - 1) / 2) / 3.0) ** 2)
    # Reference: the autocorrelation of a Gaussian of σ is a Gaussian of σ√2, FWHM
    # 2 sqrt(2 ln 2) √2 σ, here in µm. Measured within 4 % per plane (the widest planes lose
    # their tails to the 40 px field and the offset subtraction) and 0.4 % at the waist.
    np.testing.assert_allclose(report.lateral_fwhm_per_plane_um,
                               FWHM_PER_SIGMA * np.sqrt(2) * sigma_px * pixel_um, rtol=0.06)
    assert report.lateral_resolution_um == pytest.approx(
        FWHM_PER_SIGMA * np.sqrt(2) * 1.4 * pixel_um, rel=0.02)
    # Reference: the overlap of centred Gaussians, 2 σ1 σ2 / (σ1² + σ2²) (measured within
    # 1e-3). Its smallest value, between the waist and the ends, stays above 0.5, so no
    # plane decorrelates in the scan and no axial resolution can be given.
    overlap = 2 * np.outer(sigma_px, sigma_px) / (sigma_px[:, None] ** 2 + sigma_px[None] ** 2)
    np.testing.assert_allclose(report.depth_ncc, overlap, atol=5e-3)
    assert overlap.min() > 0.5
    assert report.axial_resolution_um is None and report.distinguishable_planes is None
    # Reference: numpy's SVD of the cleaned stack, and Eckart–Young: the rank-r truncation
    # leaves exactly the discarded share of the squared norm, so the retained energy is
    # 1 − ‖P − P_r‖² / ‖P‖² of the model built (rank 2 here, retained 0.9994).
    stack = np.asarray(calibration.psf_zyx, np.float64)
    singular = np.linalg.svd(stack.reshape(z, -1), compute_uv=False)
    np.testing.assert_allclose(report.singular_values, singular, rtol=1e-6,
                               atol=1e-9 * singular[0])
    approximation = np.asarray(calibration.model.expanded_stack(), np.float64)
    assert 1 < report.rank < z
    assert report.retained_energy == pytest.approx(
        1 - ((stack - approximation) ** 2).sum() / (stack**2).sum(), abs=1e-6)


def test_without_matplotlib_the_text_says_so(report, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    monkeypatch.setitem(sys.modules, "matplotlib.backends.backend_agg", None)
    written = report.write(tmp_path / "r")
    assert [p.split("/")[-1] for p in written.files] == ["summary.txt", "report.json"]
    assert "install matplotlib" in (tmp_path / "r" / "summary.txt").read_text()


def test_psf_picture_shows_the_cleaned_planes(rng, speckle, camera, tmp_path):
    from matplotlib import colormaps
    from matplotlib.image import imread

    raw, dark = camera(rng, speckle(rng, 8, 40), photons=3e5)
    calibration = calibrate_stack(raw, dark=dark, depth_step_um=2.0, pixel_size_um=0.5)
    written = calibration.report.write(tmp_path / "r", psf_zyx=calibration.psf_zyx)
    path = tmp_path / "r" / "psf.png"
    assert str(path) in written.files
    assert "psf.png" in (tmp_path / "r" / "summary.txt").read_text()
    assert "psf.png" in json.loads((tmp_path / "r" / "report.json").read_text())["files"]
    # Reference: matplotlib reads it back as a PNG of the figure's size (5 panels of 3 x 3.4
    # inches at 100 dpi) ...
    image = imread(path)[..., :3]
    assert image.shape == (340, 1500, 3)
    # ... showing the planes in the inferno map from 0 to each view's maximum: every panel's
    # brightest pixel is inferno(1.0); the PNG's 8-bit rounding (1/255) is far within 0.02.
    top = np.asarray(colormaps["inferno"](1.0)[:3])
    near_top = np.all(np.abs(image - top) < 0.02, axis=-1)
    panels = [near_top[:, k * 300:(k + 1) * 300].any() for k in range(5)]
    assert all(panels), panels


def test_summary_explains_distinguishable_depths_against_localisation(report):
    text = report.summary_text()
    assert "distinguishable depths: the 16 um scan over that distance" in text
    assert "decorrelate below 0.5" in text
    assert "not a limit on locating points" in text and "beads found at their depth" in text
