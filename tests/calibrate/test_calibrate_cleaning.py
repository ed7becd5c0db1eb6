"""Cleaning a raw bead scan: known PSFs recovered from offset, Poisson noise and hot pixels."""

from __future__ import annotations

import numpy as np
import pytest
from skimage.measure import block_reduce

from volrecon.calibrate import (
    bin_pixels,
    border_background,
    clean_psf_stack,
    crop_pixels,
    mask_background,
    suppress_hot_pixels,
)
from volrecon.errors import ConfigError, DataError, ShapeError


def test_known_psf_recovered_from_offset_poisson_and_hot_pixels(rng, gaussian, camera):
    psf = gaussian(9, 48)
    raw, _ = camera(rng, psf, photons=5e4, offset=100.0, hot=5)
    cleaned = clean_psf_stack(raw)
    # Known synthetic truth: the noise-free PSF. Criterion from the issue: Pearson
    # correlation (numpy.corrcoef) >= 0.95 for every plane.
    for got, truth in zip(cleaned.psf_zyx, psf, strict=True):
        assert np.corrcoef(got.ravel(), truth.ravel())[0, 1] >= 0.95
    # Normalised over the stack: each plane sums to its measured throughput; the truth has
    # equal energy in every plane (Poisson noise and masked-off faint tails: a few per cent).
    sums = cleaned.psf_zyx.sum(axis=(1, 2))
    np.testing.assert_allclose(sums, cleaned.throughput, rtol=1e-5)
    np.testing.assert_allclose(sums, 1.0, rtol=0.03)
    assert cleaned.psf_zyx.min() >= 0 and cleaned.psf_zyx.dtype == np.float32
    # Known truth: the camera offset was 100 counts (Poisson: the mean is the offset; the
    # clipped mean of ~700 border pixels is within 1 count).
    np.testing.assert_allclose(cleaned.background, 100.0, atol=1.0)
    # Known truth: 5 hot pixels in each of the 9 planes, all on dark background here.
    assert cleaned.hot_pixels == 5 * 9


def test_field_filling_psf_recovered_with_a_dark_stack(rng, speckle, camera):
    psf = speckle(rng, 9, 48)
    raw, dark = camera(rng, psf, photons=5e5, offset=100.0, hot=5)
    cleaned = clean_psf_stack(raw, dark_yx=dark)
    # Known synthetic truth as above. The caustic fills the field, so the offset comes from
    # the dark frames, which also carry the hot pixels' dark current.
    for got, truth in zip(cleaned.psf_zyx, psf, strict=True):
        assert np.corrcoef(got.ravel(), truth.ravel())[0, 1] >= 0.95


def test_throughput_follows_known_plane_energies(rng, gaussian, camera):
    psf = gaussian(4, 48)
    energies = np.array([1.0, 0.5, 0.8, 0.25])
    raw, _ = camera(rng, psf * energies[:, None, None], photons=1e5)
    cleaned = clean_psf_stack(raw)
    # Known truth: plane energies in ratio 1 : 0.5 : 0.8 : 0.25. Poisson noise on 1e5
    # photons and the masked-off faint tails leave a few per cent.
    np.testing.assert_allclose(cleaned.throughput, energies, rtol=0.05)
    np.testing.assert_allclose(cleaned.plane_sums, 1e5 * energies, rtol=0.05)


def test_dark_frame_removes_a_fixed_pattern(rng, gaussian):
    psf = gaussian(3, 40)
    pattern = 100 + 30 * np.sin(np.arange(40) / 3.0)[None, :] * np.ones((40, 1))
    raw = rng.poisson(5e4 * psf + pattern).astype(np.uint16)
    darks = rng.poisson(np.broadcast_to(pattern, (20, 40, 40))).astype(np.uint16)
    cleaned = clean_psf_stack(raw, dark_yx=darks)
    # Known truth: the offset pattern; with it subtracted the PSF is recovered (same
    # criterion as above) and nothing is left at the border.
    for got, truth in zip(cleaned.psf_zyx, psf, strict=True):
        assert np.corrcoef(got.ravel(), truth.ravel())[0, 1] >= 0.95
    assert (cleaned.background == 0).all()
    without = clean_psf_stack(raw, dark_yx=pattern)
    np.testing.assert_allclose(without.throughput, cleaned.throughput, rtol=0.05)


def test_hot_pixels_replaced_but_a_sharp_psf_peak_kept(rng):
    yy, xx = np.mgrid[:32, :32]
    # A well-sampled sharp PSF: Gaussian sigma 0.8 px, its neighbours at 46 % of the peak.
    peak = np.exp(-((yy - 16) ** 2 + (xx - 16) ** 2) / (2 * 0.8**2)) * 1000
    stack = np.stack([peak, peak]) + rng.normal(0, 2, (2, 32, 32))
    stack[:, 5, 7] += 800
    cleaned, count = suppress_hot_pixels(stack)
    # Known truth: one hot pixel per plane; the PSF peak is not touched.
    assert count == 2
    np.testing.assert_array_equal(cleaned[:, 16, 16], stack[:, 16, 16].astype(np.float32))
    assert abs(cleaned[0, 5, 7]) < 10


def test_background_mask_removes_the_clipping_pedestal(rng, gaussian, camera):
    psf = gaussian(2, 64)
    raw = camera(rng, psf, photons=2e4)[0].astype(np.float64) - 100.0
    masked, kept = mask_background(raw)
    assert 0 < kept < 0.3
    # Known truth: pure Poisson(100) noise (sigma 10) clipped at 0 keeps a mean of
    # sigma/sqrt(2 pi) ~ 4 counts per pixel (half-normal mean), i.e. ~16 000 counts over 64²
    # pixels, as much as the PSF's 20 000 photons.
    clipped_raw = np.clip(raw, 0, None).sum(axis=(1, 2))
    assert (clipped_raw > 1.5 * 2e4).all()
    # After masking that bias is confined to the kept pixels: at most 0.4 sigma each, plus
    # 3 standard deviations of the summed Poisson noise; faint tails lost: under 3 %.
    kept_pixels = kept * 64 * 64
    bias = 0.4 * 10.0 * kept_pixels + 3 * np.sqrt(kept_pixels * 100 + 2e4)
    clipped_masked = np.clip(masked, 0, None).sum(axis=(1, 2))
    assert (clipped_masked > 0.97 * 2e4).all() and (clipped_masked < 2e4 + bias).all()


def test_border_background_on_known_offset(rng):
    stack = rng.normal(50.0, 3.0, (2, 64, 64))
    stack[:, 20:44, 20:44] += 500.0
    stack[:, :2, :32] += 1000.0  # bright light on part of the border band
    background, sigma = border_background(stack)
    # Known truth: offset 50, noise 3. The clipped mean ignores the bright quarter band.
    np.testing.assert_allclose(background, 50.0, atol=0.3)
    np.testing.assert_allclose(sigma, 3.0, rtol=0.1)


def test_binning_matches_skimage_block_reduce(rng):
    stack = rng.random((2, 13, 10))
    # Reference: skimage.measure.block_reduce with numpy.sum, on the whole blocks only.
    expected = block_reduce(stack[:, :12, :9], (1, 3, 3), np.sum)
    np.testing.assert_allclose(bin_pixels(stack, 3), expected)
    assert bin_pixels(stack, 1) is stack


def test_crop_and_bin_in_clean(rng, gaussian, camera):
    raw, _ = camera(rng, gaussian(3, 48), photons=5e4)
    cleaned = clean_psf_stack(raw, crop_yx=(4, 44, 2, 46), bin_factor=2)
    assert cleaned.psf_zyx.shape == (3, 20, 22)
    np.testing.assert_array_equal(crop_pixels(raw, (4, 44, 2, 46)), raw[:, 4:44, 2:46])
    assert crop_pixels(raw, None) is raw


def test_without_normalisation_keeps_counts(rng, gaussian, camera):
    raw, _ = camera(rng, gaussian(2, 40), photons=3e4)
    cleaned = clean_psf_stack(raw, normalization="none", support_sigma=None, hot_pixel_sigma=None)
    assert not cleaned.normalized and cleaned.support_fraction == 1.0
    # Known truth: 3e4 photons per plane plus the positive bias of clipped noise.
    assert (cleaned.psf_zyx.sum(axis=(1, 2)) > 3e4 * 0.95).all()


def test_input_not_modified(rng, gaussian, camera):
    raw, _ = camera(rng, gaussian(2, 32), photons=1e4)
    before = raw.copy()
    clean_psf_stack(raw, dark_yx=np.full((32, 32), 99.0))
    np.testing.assert_array_equal(raw, before)


def _planes(value=1.0):
    yy, xx = np.mgrid[:16, :16]
    blob = 10 * np.exp(-((yy - 8) ** 2 + (xx - 8) ** 2) / 4.0)
    return np.broadcast_to(value + blob, (3, 16, 16)).copy()


@pytest.mark.parametrize("stack, kwargs, error, match", [
    (np.ones((16, 16)), {}, ShapeError, "3 axes"),
    (np.where(np.eye(16, dtype=bool)[None], np.nan, _planes()), {}, DataError, "NaN"),
    (np.concatenate([_planes(), np.zeros((1, 16, 16))]), {}, DataError, "plane 3 .* all zero"),
    (np.concatenate([_planes(), np.full((1, 16, 16), 5.0)]), {}, DataError, "plane 3 .* no light"),
    (_planes(), {"dark_yx": np.zeros((8, 8))}, ShapeError, "dark frame has shape"),
    (_planes(), {"dark_yx": np.full((16, 16), np.inf)}, DataError, "dark frame"),
    (_planes(), {"crop_yx": (0, 20, 0, 8)}, ConfigError, "--crop"),
    (_planes(), {"crop_yx": (5, 5, 0, 8)}, ConfigError, "--crop"),
    (_planes(), {"bin_factor": 0}, ConfigError, "--bin"),
    (_planes(), {"bin_factor": 17}, ConfigError, "--bin 17"),
    (_planes(), {"hot_pixel_sigma": 0.0}, ConfigError, "hot_pixel_sigma"),
    (_planes(), {"support_sigma": -1.0}, ConfigError, "support_sigma"),
])
def test_bad_input_is_refused(stack, kwargs, error, match):
    with pytest.raises(error, match=match):
        clean_psf_stack(stack, **kwargs)


def test_bad_tuning_values_are_refused():
    with pytest.raises(ConfigError, match="isolation"):
        suppress_hot_pixels(np.ones((1, 4, 4)), isolation=1.5)
    with pytest.raises(ConfigError, match="smoothing_px"):
        mask_background(np.ones((1, 4, 4)), smoothing_px=0)
