"""Thin elements: lens focus (Airy pattern), microlens array, diffuser statistics, apertures."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import j1

from volrecon.errors import ConfigError, ShapeError
from volrecon.simulate import (
    PhaseMask,
    circular_aperture,
    microlens_array_mask,
    propagate,
    random_diffuser_mask,
    thin_lens_mask,
)

WAVELENGTH = 0.5  # um


def _focus(n=256, dx=1.0, radius=64.0, focal=1280.0):
    lens = thin_lens_mask((n, n), focal_length_um=focal, pixel_size_um=dx, radius_um=radius)
    return propagate(lens.transmittance(WAVELENGTH), focal, wavelength_um=WAVELENGTH,
                     pixel_size_um=dx)


def test_thin_lens_focus_has_airy_first_zero_at_1_22_lambda_n():
    """Focal spot of a lens of f-number N: first dark ring at r = 1.22 lambda N.

    Reference: Goodman, Introduction to Fourier Optics, ch. 4-5 (Fraunhofer pattern of a
    circular aperture in the focal plane of a lens); Born & Wolf, Principles of Optics,
    sec. 8.5.2 (first zero of 2 J1(v)/v at v = 3.8317, i.e. 0.61 lambda / NA = 1.22 lambda N).
    """
    n, dx, radius, focal = 256, 1.0, 64.0, 1280.0
    f_number = focal / (2.0 * radius)  # N = 10: first zero at 6.1 um = 6.1 pixels
    field = _focus(n, dx, radius, focal)
    centre = field[n // 2, n // 2]
    assert np.unravel_index(np.argmax(abs(field)), field.shape) == (n // 2, n // 2)
    # The amplitude 2 J1(v)/v changes sign at the zero; find the crossing along 4 directions
    # by linear interpolation of the real amplitude (phase referred to the centre).
    zeros = []
    for profile in (field[n // 2, n // 2:], field[n // 2, n // 2::-1],
                    field[n // 2:, n // 2], field[n // 2::-1, n // 2]):
        amp = (profile[:12] * np.conj(centre) / abs(centre)).real
        i = int(np.argmax(amp < 0))
        zeros.append((i - 1 + amp[i - 1] / (amp[i - 1] - amp[i])) * dx)
    expected = 1.22 * WAVELENGTH * f_number
    # 0.1 um = 1/60 of the ring radius: linear interpolation of a near-linear zero crossing on
    # a 1 um grid, and 1.22 is itself 3.8317/pi rounded (0.3 % low).
    np.testing.assert_allclose(zeros, expected, atol=0.1)


def test_thin_lens_focal_profile_matches_airy_function():
    """The whole focal intensity profile follows [2 J1(v) / v]^2, v = pi r / (lambda N).

    Reference: Born & Wolf, Principles of Optics, sec. 8.5.2 (Airy pattern); scipy.special.j1.
    """
    n, dx, radius, focal = 256, 1.0, 64.0, 1280.0
    intensity = abs(_focus(n, dx, radius, focal)) ** 2
    intensity /= intensity.max()
    r = np.arange(1, 25) * dx
    v = np.pi * r / (WAVELENGTH * focal / (2.0 * radius))
    airy = (2.0 * j1(v) / v) ** 2
    # 2e-3 of the peak: the lens is paraxial and sampled finely (its phase slope at the rim is
    # 0.1 cycles/um against a Nyquist limit of 0.5); what remains is the rim's pixelation.
    np.testing.assert_allclose(intensity[n // 2, n // 2 + 1:n // 2 + 25], airy, atol=2e-3)


def test_microlens_array_focuses_a_plane_wave_onto_its_lattice():
    """Each lenslet of a hexagonal array focuses a plane wave on its own centre.

    Known truth: the lattice points (0, 0), (0, ±p), (±p √3/2, ±p/2) of the design.
    """
    n, dx, pitch, focal = 256, 1.0, 64.0, 800.0
    mla = microlens_array_mask((n, n), pitch_um=pitch, focal_length_um=focal, pixel_size_um=dx)
    intensity = abs(propagate(mla.transmittance(WAVELENGTH), focal, wavelength_um=WAVELENGTH,
                              pixel_size_um=dx)) ** 2
    c = n // 2
    for dy, dxx in [(0.0, 0.0), (0.0, pitch), (0.0, -pitch), (pitch * np.sqrt(3) / 2, pitch / 2),
                    (-pitch * np.sqrt(3) / 2, -pitch / 2)]:
        y0, x0 = round(c + dy / dx), round(c + dxx / dx)
        window = intensity[y0 - 6:y0 + 7, x0 - 6:x0 + 7]
        iy, ix = np.unravel_index(np.argmax(window), window.shape)
        # One pixel: the lattice point rounded to the grid.
        assert abs(y0 - 6 + iy - (c + dy / dx)) <= 1.0 and abs(x0 - 6 + ix - (c + dxx / dx)) <= 1.0
        # A focused spot: (p^2 / (lambda f))^2 ~ 100 times the incident intensity of 1.
        assert window.max() > 30.0


def test_square_microlens_cells_are_squares():
    mla = microlens_array_mask((64, 64), pitch_um=16.0, focal_length_um=500.0, pixel_size_um=1.0,
                               layout="square")
    # Known truth: the path is -r^2/(2f) from the nearest lattice point; at a cell corner
    # (8, 8) um from a centre it is -(64 + 64) / 1000.
    assert mla.optical_path_um[32, 32] == 0.0
    assert mla.optical_path_um[32 + 8, 32 + 7] == pytest.approx(-(64 + 49) / 1000.0, rel=1e-6)


def test_diffuser_has_the_requested_height_statistics():
    """Height rms exactly sigma; autocorrelation C(l) / C(0) = exp(-1) at the correlation length.

    Known truth: the Gaussian correlation C(r) = sigma^2 exp(-r^2 / l^2) the surface is built
    with, estimated from the circular autocorrelation (Wiener–Khinchin, numpy.fft).
    """
    n, dx, length, sigma, step = 512, 1.0, 8.0, 0.3, 0.5
    mask = random_diffuser_mask((n, n), pixel_size_um=dx, correlation_length_um=length,
                                height_rms_um=sigma, index_step=step, rng=3)
    height = mask.optical_path_um.astype(np.float64) / step
    assert height.std() == pytest.approx(sigma, rel=1e-4)
    assert abs(height.mean()) < 1e-6
    acf = np.fft.ifft2(abs(np.fft.fft2(height)) ** 2).real
    acf /= acf[0, 0]
    lag = int(length / dx)
    measured = 0.25 * (acf[lag, 0] + acf[0, lag] + acf[-lag, 0] + acf[0, -lag])
    # 0.03: the sampling error of an autocorrelation estimated from (n / l)^2 = 4096
    # correlation cells is about 1 / sqrt(4096) = 0.016 of C(0).
    assert measured == pytest.approx(np.exp(-1.0), abs=0.03)
    assert np.all(mask.amplitude == 1.0)


def test_diffuser_is_reproducible_from_its_seed():
    a = random_diffuser_mask((32, 32), pixel_size_um=1.0, correlation_length_um=4.0,
                             height_rms_um=0.2, index_step=0.5, rng=7)
    b = random_diffuser_mask((32, 32), pixel_size_um=1.0, correlation_length_um=4.0,
                             height_rms_um=0.2, index_step=0.5, rng=7)
    np.testing.assert_array_equal(a.optical_path_um, b.optical_path_um)


def test_circular_aperture_area():
    """Area of the covered fraction vs pi r^2 (known truth)."""
    for radius in (5.3, 20.0):
        ap = circular_aperture((64, 64), radius_um=radius, pixel_size_um=1.0)
        # 0.5 %: 8 x 8 sub-samples per pixel leave an edge error of ~1/16 pixel per edge pixel.
        assert ap.sum() == pytest.approx(np.pi * radius**2, rel=5e-3)
        assert ap.dtype == np.float32 and ap.min() >= 0 and ap.max() <= 1


def test_mask_product_adds_paths_and_multiplies_amplitudes():
    a = thin_lens_mask((16, 16), focal_length_um=100.0, pixel_size_um=1.0, radius_um=6.0)
    b = PhaseMask(np.full((16, 16), 0.25), np.full((16, 16), 0.5), 1.0)
    c = a * b
    np.testing.assert_allclose(c.optical_path_um, a.optical_path_um + 0.25, atol=1e-6)
    np.testing.assert_allclose(c.amplitude, a.amplitude * 0.5)
    # exp(i 2 pi 0.25 / 0.5) = -1: the extra path flips the sign of the transmittance.
    np.testing.assert_allclose(c.transmittance(0.5), -0.5 * a.transmittance(0.5), atol=1e-5)
    assert not c.optical_path_um.flags.writeable


def test_mask_errors():
    with pytest.raises(ShapeError, match="same 2-D shape"):
        PhaseMask(np.zeros((4, 4)), np.ones((4, 5)), 1.0)
    with pytest.raises(ShapeError, match="same grid"):
        _ = PhaseMask.clear((4, 4), pixel_size_um=1.0) * PhaseMask.clear((4, 4), pixel_size_um=2.0)
    with pytest.raises(ConfigError, match="NaN or Inf"):
        PhaseMask(np.full((2, 2), np.nan), np.ones((2, 2)), 1.0)
    with pytest.raises(ConfigError, match="layout"):
        microlens_array_mask((8, 8), pitch_um=4.0, focal_length_um=10.0, pixel_size_um=1.0,
                             layout="round")
    with pytest.raises(ConfigError, match="correlation_length_um"):
        random_diffuser_mask((8, 8), pixel_size_um=1.0, correlation_length_um=0.0,
                             height_rms_um=0.1, index_step=0.5)
    with pytest.raises(ShapeError, match="shape_yx"):
        circular_aperture((8,), radius_um=1.0, pixel_size_um=1.0)
