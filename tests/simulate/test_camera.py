"""Camera statistics against the linear camera model of EMVA 1288 and the Poisson law."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from volrecon.errors import ConfigError, DataError, ShapeError
from volrecon.simulate import Camera

N_PIXELS = (512, 512)


def test_mean_and_variance_follow_the_linear_camera_model():
    """E[y] = offset + K (eta mu_p + mu_d); Var[y] = K^2 (eta mu_p + mu_d + sigma_r^2) + 1/12.

    Reference: EMVA Standard 1288 (release 3.1), the linear camera model: shot noise is
    Poisson in electrons, read noise Gaussian, quantisation noise 1/12 DN^2 (written from
    the standard's model, values not copied from it).
    """
    cam = Camera(quantum_efficiency=0.8, gain_adu_per_electron=0.5, read_noise_electrons=1.6,
                 offset_adu=100.0, dark_current_electrons_per_s=50.0, exposure_s=0.1,
                 full_well_electrons=None)
    photons = 200.0
    frame = cam.expose(np.full(N_PIXELS, photons), rng=1).astype(np.float64)
    electrons = 0.8 * photons + 50.0 * 0.1
    mean = 100.0 + 0.5 * electrons
    variance = 0.25 * (electrons + 1.6**2) + 1.0 / 12.0
    n = frame.size
    # 5 standard errors of the sample mean sqrt(var / n) and sample variance var sqrt(2 / n).
    assert frame.mean() == pytest.approx(mean, abs=5 * np.sqrt(variance / n))
    assert frame.var() == pytest.approx(variance, abs=5 * variance * np.sqrt(2.0 / n))
    assert cam.expected_adu(np.full((2, 2), photons)) == pytest.approx(mean)


def test_photon_transfer_slope_is_the_system_gain():
    """sigma_y^2 - sigma_dark^2 = K (mu_y - mu_dark): the photon transfer method for K.

    Reference: EMVA Standard 1288, determination of the overall system gain K from the
    photon transfer curve.
    """
    cam = Camera(gain_adu_per_electron=2.0, read_noise_electrons=3.0, full_well_electrons=None)
    levels = [0.0, 50.0, 100.0, 200.0, 400.0]
    rng = np.random.default_rng(5)
    means, variances = [], []
    for level in levels:
        frames = cam.expose(np.full((2, 256, 256), level), rng=rng).astype(np.float64)
        # The difference of two frames removes any fixed pattern (EMVA's two-frame method).
        means.append(frames.mean())
        variances.append(np.var(frames[0] - frames[1]) / 2.0)
    slope = np.polyfit(np.array(means) - means[0], np.array(variances) - variances[0], 1)[0]
    # 2 %: the variance at the top level has a relative standard error sqrt(2 / 65536) = 0.6 %.
    assert slope == pytest.approx(2.0, rel=0.02)


def test_dark_frame_noise_is_read_noise_plus_quantisation():
    """With the shutter closed and no dark current, Var[y] = K^2 sigma_r^2 + 1/12 (EMVA 1288)."""
    cam = Camera(gain_adu_per_electron=2.0, read_noise_electrons=1.5,
                 dark_current_electrons_per_s=0.0)
    dark = cam.dark_frames((256, 256), 4, rng=2).astype(np.float64)
    assert dark.shape == (4, 256, 256)
    expected = 4.0 * 1.5**2 + 1.0 / 12.0
    assert dark.mean() == pytest.approx(100.0, abs=5 * np.sqrt(expected / dark.size))
    assert dark.var() == pytest.approx(expected, abs=5 * expected * np.sqrt(2.0 / dark.size))


def test_counts_are_poisson_without_read_noise():
    """Unit gain, no read noise, no offset: counts are Poisson(eta mu_p) exactly.

    Reference: scipy.stats.poisson.pmf.
    """
    cam = Camera(quantum_efficiency=0.5, gain_adu_per_electron=1.0, read_noise_electrons=0.0,
                 offset_adu=0.0, dark_current_electrons_per_s=0.0)
    counts = cam.expose(np.full(N_PIXELS, 6.0), rng=3).ravel()
    values = np.arange(12)
    observed = np.bincount(counts, minlength=values.size)[:values.size] / counts.size
    pmf = stats.poisson.pmf(values, 3.0)
    # 5 binomial standard errors per bin.
    tolerance = 5 * np.sqrt(pmf * (1 - pmf) / counts.size)
    assert np.all(abs(observed - pmf) <= tolerance), (observed, pmf)


def test_saturation_and_bit_range():
    cam = Camera(full_well_electrons=1000.0, gain_adu_per_electron=1.0, read_noise_electrons=0.0)
    frame = cam.expose(np.full((8, 8), 1e6), rng=0)
    # Known truth: a full pixel reads offset + K * full well.
    assert np.all(frame == 100 + 1000)
    loud = Camera(full_well_electrons=None, gain_adu_per_electron=10.0, bit_depth=12)
    assert loud.expose(np.full((4, 4), 1e6), rng=0).max() == 4095 == loud.max_adu
    assert frame.dtype == np.uint16


def test_hot_pixels_are_a_fixed_pattern():
    cam = Camera(hot_pixel_fraction=0.01, hot_pixel_electrons_per_s=5000.0, hot_pixel_seed=4,
                 read_noise_electrons=0.0, dark_current_electrons_per_s=0.0, exposure_s=0.1)
    hot = cam.hot_pixels((200, 200))
    np.testing.assert_array_equal(hot, cam.hot_pixels((200, 200)))
    assert 0.007 < hot.mean() < 0.013  # 400 expected, Poisson spread +-20
    dark = cam.dark_frames((200, 200), 3, rng=1).astype(np.float64)
    # Known truth: hot pixels read offset + K * rate * t = 100 + 0.5 * 500 on average.
    assert dark[:, hot].mean() == pytest.approx(350.0, rel=0.02)
    assert np.all(dark[:, ~hot] == 100.0)


def test_expose_is_reproducible_and_leaves_input_alone(rng):
    photons = rng.random((3, 16, 16)) * 50
    before = photons.copy()
    cam = Camera()
    np.testing.assert_array_equal(cam.expose(photons, rng=9), cam.expose(photons, rng=9))
    np.testing.assert_array_equal(photons, before)


def test_camera_errors():
    with pytest.raises(ConfigError, match="quantum_efficiency"):
        Camera(quantum_efficiency=1.5)
    with pytest.raises(ConfigError, match="bit_depth"):
        Camera(bit_depth=17)
    with pytest.raises(ConfigError, match="gain_adu_per_electron"):
        Camera(gain_adu_per_electron=0.0)
    with pytest.raises(DataError, match="non-negative"):
        Camera().expose(-np.ones((4, 4)))
    with pytest.raises(ShapeError, match="2 axes"):
        Camera().expose(np.ones(4))
    with pytest.raises(ConfigError, match="n_frames"):
        Camera().dark_frames((4, 4), 0)
