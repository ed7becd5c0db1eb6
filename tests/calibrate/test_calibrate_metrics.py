"""Depth correlation, axial and lateral resolution against closed-form Gaussian results."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.calibrate import autocorrelation_fwhm, axial_resolution, depth_correlation
from volrecon.errors import ConfigError, ShapeError

FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def _gaussians(widths, n=128, shifts=None):
    yy, xx = np.mgrid[:n, :n]
    shifts = shifts if shifts is not None else [0] * len(widths)
    return np.stack([np.exp(-((yy - n / 2) ** 2 + (xx - n / 2 - s) ** 2) / (2 * w**2))
                     for w, s in zip(widths, shifts, strict=True)])


def test_depth_correlation_of_gaussians_is_the_overlap_integral():
    widths = np.array([1.5, 2.0, 3.0, 4.5, 6.0])
    ncc = depth_correlation(_gaussians(widths))
    # Reference: the closed-form overlap of two centred 2-D Gaussians,
    # ∫g1 g2 / sqrt(∫g1² ∫g2²) = 2 σ1 σ2 / (σ1² + σ2²). Mean subtraction on a 128² field
    # changes it by < 0.5 %.
    expected = 2 * np.outer(widths, widths) / (widths[:, None] ** 2 + widths[None] ** 2)
    np.testing.assert_allclose(ncc, expected, rtol=5e-3)


def test_depth_correlation_ignores_lateral_shift():
    ncc = depth_correlation(_gaussians([2.0, 2.0], shifts=[0, 7]))
    # Known truth: identical PSFs shifted by 7 px are the same up to a translation (the
    # subtracted means overlap only partly at that lag: 2e-4).
    assert ncc[0, 1] == pytest.approx(1.0, abs=1e-3)
    # Identical planes: 1 up to single-precision rounding.
    assert depth_correlation(_gaussians([2.0, 2.0]))[0, 1] == pytest.approx(1.0, abs=1e-5)


def test_axial_resolution_on_the_gaussian_family():
    # σ(z) = sqrt(1 + z²) for planes 0..8 with step 0.5 µm: for plane 0 the overlap
    # 2σ/(1 + σ²) falls to 0.5 where σ² - 4σ + 1 = 0, σ = 2 + sqrt(3), z = sqrt(σ² - 1).
    depths = 0.5 * np.arange(9)
    ncc = depth_correlation(_gaussians(np.sqrt(1 + depths**2)))
    per_plane, median = axial_resolution(ncc, 0.5)
    crossing = np.sqrt((2 + np.sqrt(3)) ** 2 - 1)
    # Reference: that closed form; linear interpolation between planes 0.5 µm apart on a
    # curve this smooth is good to 2 %.
    assert per_plane[0] == pytest.approx(crossing, rel=0.02)
    assert median is not None and np.isnan(per_plane).sum() < 9


def test_axial_resolution_interpolates_and_averages_directions():
    z = np.arange(7)
    ncc = np.clip(1.0 - 0.2 * np.abs(z[:, None] - z[None]), 0, 1)
    per_plane, median = axial_resolution(ncc, 2.0)
    # Known truth: NCC = 1 - 0.2 |Δ| crosses 0.5 at |Δ| = 2.5 planes = 5 µm, both ways.
    np.testing.assert_allclose(per_plane, 5.0)
    assert median == pytest.approx(5.0)
    flat = np.ones((4, 4))
    per_plane, median = axial_resolution(flat, 1.0)
    assert np.isnan(per_plane).all() and median is None


def test_autocorrelation_fwhm_of_a_gaussian():
    widths = np.array([1.5, 2.5, 4.0])
    # Reference: the autocorrelation of a Gaussian of standard deviation σ is a Gaussian of
    # σ√2, FWHM 2 sqrt(2 ln 2) √2 σ. Sampling and mean subtraction: within 3 %.
    np.testing.assert_allclose(autocorrelation_fwhm(_gaussians(widths)),
                               FWHM_PER_SIGMA * np.sqrt(2) * widths, rtol=0.03)


def test_autocorrelation_of_a_flat_plane_is_undefined():
    stack = np.ones((1, 16, 16))
    assert np.isnan(autocorrelation_fwhm(stack)).all()
    assert depth_correlation(stack)[0, 0] == 0.0


@pytest.mark.parametrize("ncc, step, threshold, error", [
    (np.ones((3, 4)), 1.0, 0.5, ShapeError),
    (np.ones((3, 3)), 0.0, 0.5, ConfigError),
    (np.ones((3, 3)), 1.0, 1.0, ConfigError),
])
def test_axial_resolution_refuses_bad_input(ncc, step, threshold, error):
    with pytest.raises(error):
        axial_resolution(ncc, step, threshold=threshold)


def test_metrics_need_a_stack():
    with pytest.raises(ShapeError, match="3 axes"):
        depth_correlation(np.ones((4, 4)))
