"""Free-space propagation against closed-form diffraction results."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.errors import ConfigError, ShapeError
from volrecon.simulate import band_limit_frequency, circular_aperture, propagate

WAVELENGTH = 0.5  # um


def test_on_axis_intensity_behind_circular_aperture_matches_fresnel():
    """Plane wave through a clear disc of radius a: on-axis intensity versus distance.

    Reference: J. W. Goodman, Introduction to Fourier Optics (3rd ed., 2005), Fresnel
    diffraction by a circular aperture, on axis: I(z) = 4 I0 sin^2(pi a^2 / (2 lambda z)).
    """
    dx, n, radius = 0.5, 256, 20.0
    aperture = circular_aperture((n, n), radius_um=radius, pixel_size_um=dx)
    fresnel_numbers = np.linspace(0.5, 3.0, 26)  # a^2 / (lambda z): maxima at odd, zeros at even
    distances = radius**2 / (WAVELENGTH * fresnel_numbers)
    measured = np.array([
        abs(propagate(aperture, z, wavelength_um=WAVELENGTH, pixel_size_um=dx)[n // 2, n // 2])
        ** 2 for z in distances])
    expected = 4.0 * np.sin(np.pi * radius**2 / (2.0 * WAVELENGTH * distances)) ** 2
    # Tolerance 0.06 I0 (1.5 % of the 4 I0 peak): the closed form is paraxial (its phase error
    # a^4 / (8 lambda z^3) reaches 0.03 rad at N_F = 3 here) and the disc edge is pixelated
    # (area error ~0.3 %). Both grow with N_F; we stop at 3.
    np.testing.assert_allclose(measured, expected, atol=0.06)
    # The curve really oscillates over this range: two maxima of 4 I0, zeros in between.
    assert measured.max() > 3.9 and measured.min() < 0.05


def test_gaussian_beam_width_follows_rayleigh_law():
    """A Gaussian beam of waist w0 widens as w(z) = w0 sqrt(1 + (z / zR)^2), zR = pi w0^2 / lambda.

    Reference: A. E. Siegman, Lasers (1986), ch. 17 (paraxial Gaussian beams); B. E. A. Saleh,
    M. C. Teich, Fundamentals of Photonics, ch. 3.
    """
    dx, n, waist = 1.0, 256, 10.0
    y, x = np.mgrid[:n, :n] - n // 2
    beam = np.exp(-(x**2 + y**2) * dx**2 / waist**2).astype(np.complex64)
    rayleigh = np.pi * waist**2 / WAVELENGTH
    for z in (0.5 * rayleigh, rayleigh, 2.0 * rayleigh):
        intensity = abs(propagate(beam, z, wavelength_um=WAVELENGTH, pixel_size_um=dx)) ** 2
        # For I ∝ exp(-2 r^2 / w^2), the second moment <x^2> = w^2 / 4.
        second_moment = (intensity * (x * dx) ** 2).sum() / intensity.sum()
        width = 2.0 * np.sqrt(second_moment)
        expected = waist * np.sqrt(1.0 + (z / rayleigh) ** 2)
        # 0.5 %: the beam is sampled at w0/dx = 10 and stays far from the window edge, so the
        # only error is the paraxial approximation in the law itself ((lambda/w0)^2 ~ 0.3 %).
        assert width == pytest.approx(expected, rel=5e-3)


def test_energy_is_conserved_for_a_band_limited_field(rng):
    """Parseval: the transfer function has unit modulus on propagating waves, so power is kept.

    Reference: Parseval's theorem for the DFT, sum |u|^2 = sum |U|^2 / N (checked with numpy.fft).
    """
    n, dx = 128, 1.0
    noise = rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n))
    fy, fx = np.meshgrid(np.fft.fftfreq(n, dx), np.fft.fftfreq(n, dx), indexing="ij")
    keep = np.hypot(fy, fx) < 0.25  # well inside 1/lambda = 2 cycles/um and the band limit
    field = np.fft.ifft2(np.fft.fft2(noise) * keep).astype(np.complex64)
    power_in = np.sum(abs(field.astype(np.complex128)) ** 2)
    assert np.sum(abs(np.fft.fft2(field.astype(np.complex128))) ** 2) / n**2 == pytest.approx(
        power_in, rel=1e-6)  # Parseval itself, by numpy
    for z in (10.0, 300.0, -150.0):
        out = propagate(field, z, wavelength_um=WAVELENGTH, pixel_size_um=dx, pad=False)
        # float32 FFTs: relative error ~1e-6 per transform.
        assert np.sum(abs(out.astype(np.complex128)) ** 2) == pytest.approx(power_in, rel=1e-5)


def test_band_limit_keeps_exactly_the_power_inside_the_matsushima_limit(rng):
    """Power after propagation = power of the frequencies inside the band limit (Parseval).

    Reference: K. Matsushima, T. Shimobaba, Opt. Express 17, 19662 (2009):
    u_limit = 1 / (lambda sqrt((2 du z)^2 + 1)), du = 1 / (window width); here re-derived in
    the test, independent of the code under test.
    """
    n, dx, z = 96, 0.25, 30.0
    field = (rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n))).astype(np.complex64)
    spectrum = np.fft.fft2(field.astype(np.complex128))
    f = np.fft.fftfreq(n, dx)
    limit = 1.0 / (WAVELENGTH * np.sqrt((2.0 * z / (n * dx)) ** 2 + 1.0))
    kept = (abs(f)[:, None] < limit) & (abs(f)[None, :] < limit)
    assert 0.05 < kept.mean() < 0.5  # the limit really bites at this distance
    expected = np.sum(abs(spectrum[kept]) ** 2) / n**2
    out = propagate(field, z, wavelength_um=WAVELENGTH, pixel_size_um=dx, pad=False)
    assert np.sum(abs(out.astype(np.complex128)) ** 2) == pytest.approx(expected, rel=1e-5)
    assert band_limit_frequency(z, wavelength_um=WAVELENGTH, window_um=n * dx) == pytest.approx(
        limit, rel=1e-12)


def test_backward_propagation_undoes_forward(rng):
    """H(-z) H(z) = 1 on kept frequencies: a smooth field comes back (known truth: the input)."""
    n, dx = 64, 1.0
    y, x = np.mgrid[:n, :n] - n // 2
    field = (np.exp(-(x**2 + y**2) / 60.0) * np.exp(1j * 0.3 * x)).astype(np.complex64)
    out = propagate(field, 200.0, wavelength_um=WAVELENGTH, pixel_size_um=dx, pad=False,
                    band_limit=False)
    back = propagate(out, -200.0, wavelength_um=WAVELENGTH, pixel_size_um=dx, pad=False,
                     band_limit=False)
    np.testing.assert_allclose(back, field, atol=2e-5)  # float32 round-off of 4 FFTs


def test_propagate_keeps_input_and_batch_axes(rng):
    batch = (rng.standard_normal((3, 32, 32)) + 0j).astype(np.complex64)
    before = batch.copy()
    out = propagate(batch, 50.0, wavelength_um=WAVELENGTH, pixel_size_um=1.0, workers=1)
    single = propagate(batch[1], 50.0, wavelength_um=WAVELENGTH, pixel_size_um=1.0, workers=1)
    assert out.shape == batch.shape and out.dtype == np.complex64
    np.testing.assert_array_equal(batch, before)
    np.testing.assert_allclose(out[1], single, atol=1e-6)


def test_propagate_rejects_bad_input():
    with pytest.raises(ShapeError, match="at least 2 axes"):
        propagate(np.ones(8), 1.0, wavelength_um=0.5, pixel_size_um=1.0)
    with pytest.raises(ConfigError, match="wavelength_um"):
        propagate(np.ones((8, 8)), 1.0, wavelength_um=-0.5, pixel_size_um=1.0)
    with pytest.raises(ConfigError, match="pixel_size_um"):
        propagate(np.ones((8, 8)), 1.0, wavelength_um=0.5, pixel_size_um=0.0)
