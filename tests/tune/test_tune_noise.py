"""Noise estimation by photon transfer, against the camera model's textbook variance."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy.ndimage import gaussian_filter

from volrecon.errors import DataError, ShapeError, VolreconWarning
from volrecon.io.correct import FrameCorrection
from volrecon.simulate import Camera
from volrecon.tune.noise import dark_statistics, estimate_frame_noise

CAMERA = Camera(quantum_efficiency=0.7, gain_adu_per_electron=0.8, read_noise_electrons=2.0,
                offset_adu=100.0, dark_current_electrons_per_s=0.0)


def _scene(rng: np.random.Generator, shape: tuple[int, int], level: float) -> np.ndarray:
    """Smooth positive photon map with a wide range of levels (0 .. ~3 level)."""
    field = gaussian_filter(rng.random(shape), 3.0)
    field -= field.min()
    return level * 3.0 * field / field.max()


def _textbook_variance(camera: Camera, photons: np.ndarray) -> np.ndarray:
    # EMVA 1288 linear model: Var[y] = K² (η μ_p + μ_d + σ_r²) + 1/12 (quantisation).
    k = camera.gain_adu_per_electron
    return k**2 * (camera.quantum_efficiency * photons + camera.dark_electrons(photons.shape)
                   + camera.read_noise_electrons**2) + 1.0 / 12.0


def _dark(tmp_path: Path, rng: np.random.Generator, shape: tuple[int, int], n: int = 40
          ) -> tuple[np.ndarray, np.ndarray, int]:
    path = tmp_path / "dark.tif"
    tifffile.imwrite(path, CAMERA.dark_frames(shape, n, rng=rng), photometric="minisblack")
    return dark_statistics(str(path))


@pytest.mark.parametrize("level", [2.0, 40.0])
def test_gain_and_variance_match_the_camera(tmp_path: Path, rng: np.random.Generator,
                                            level: float):
    shape = (96, 96)
    photons = _scene(rng, shape, level)
    mean, variance, n = _dark(tmp_path, rng, shape)
    # Dark variance per pixel: the textbook value at zero light (sample variance of 40
    # frames: relative error sqrt(2/39) per pixel, averaged over 9216 pixels -> 0.3 %).
    assert variance.mean() == pytest.approx(_textbook_variance(CAMERA, np.zeros(shape)).mean(),
                                            rel=0.02)
    correction = FrameCorrection.build(dark_yx=mean)
    triples = [correction.apply(CAMERA.expose(np.stack([photons] * 3), rng=rng))
               for _ in range(4)]
    noise = estimate_frame_noise(triples, correction, dark_variance_yx=variance,
                                 dark_frames=n)
    # Photon-transfer slope = K (EMVA 1288 §6). 4 runs of 3 frames of 9216 pixels give a
    # standard error of ~1-2 %; 3 standard errors and 5 % bound it.
    assert abs(noise.gain_adu_per_electron - CAMERA.gain_adu_per_electron) <= \
        3 * noise.gain_stderr
    assert noise.gain_adu_per_electron == pytest.approx(CAMERA.gain_adu_per_electron, rel=0.05)
    signal = CAMERA.gain_adu_per_electron * CAMERA.quantum_efficiency * photons
    textbook = _textbook_variance(CAMERA, photons)
    np.testing.assert_allclose(noise.variance(signal).mean(), textbook.mean(), rtol=0.03)
    frame = triples[0][1]
    expected = textbook.sum() + (variance / n).sum()
    assert noise.expected_residual_energy(frame) == pytest.approx(expected, rel=0.03)
    # And the definition: the expected energy is what one frame's residual really holds.
    residual = frame - signal
    assert float((residual.astype(np.float64) ** 2).sum()) == pytest.approx(
        expected, rel=0.05)


def test_flat_field_and_binning_change_the_units(tmp_path: Path, rng: np.random.Generator):
    shape = (64, 64)
    photons = _scene(rng, shape, 30.0)
    mean, variance, n = _dark(tmp_path, rng, shape)
    flat_gain = 1.0 + 0.2 * (gaussian_filter(rng.random(shape), 4.0) - 0.5)
    flat = mean + 2000.0 * flat_gain
    correction = FrameCorrection.build(dark_yx=mean, flat_yx=flat, binning=2)
    exposures = photons * flat_gain  # the flat field modulates the light reaching pixels
    triples = [correction.apply(CAMERA.expose(np.stack([exposures] * 3), rng=rng))
               for _ in range(8)]
    noise = estimate_frame_noise(triples, correction, dark_variance_yx=variance,
                                 dark_frames=n)
    assert noise.gain_adu_per_electron == pytest.approx(CAMERA.gain_adu_per_electron, rel=0.06)
    # Textbook propagation: a corrected pixel is the mean of b² raw pixels divided by the
    # normalised flat g, so its variance is Σ Var[y_i] / g_i² / b⁴.
    g = correction.gain_yx
    raw_var = _textbook_variance(CAMERA, exposures) / g**2
    expected = raw_var.reshape(32, 2, 32, 2).sum(axis=(1, 3)) / 16.0
    signal = correction.apply(CAMERA.expected_adu(exposures)[None])[0]
    np.testing.assert_allclose(noise.variance(signal).mean(), expected.mean(), rtol=0.06)


def test_without_dark_frames_the_intercept_is_fitted(rng: np.random.Generator):
    shape = (96, 96)
    photons = _scene(rng, shape, 60.0)
    correction = FrameCorrection.build(dark_yx=np.full(shape, CAMERA.offset_adu, np.float32))
    triples = [correction.apply(CAMERA.expose(np.stack([photons] * 3), rng=rng))
               for _ in range(4)]
    noise = estimate_frame_noise(triples, correction)
    # Bright scene: the signal spread dwarfs the noise, so the fit is good to a few per cent.
    assert noise.gain_adu_per_electron == pytest.approx(CAMERA.gain_adu_per_electron, rel=0.06)
    # The intercept itself is poorly pinned at this brightness (its error is the slope's
    # times the mean level), but the variance it predicts over the frame is what matters.
    signal = CAMERA.gain_adu_per_electron * CAMERA.quantum_efficiency * photons
    textbook = _textbook_variance(CAMERA, photons)
    np.testing.assert_allclose(noise.variance(signal).mean(), textbook.mean(), rtol=0.05)
    assert noise.dark_frames == 0 and not noise.dark_mean_variance_yx.any()


UNIT_GAIN_CAMERA = Camera(quantum_efficiency=0.7, gain_adu_per_electron=1.0,
                          read_noise_electrons=1.6, offset_adu=100.0,
                          dark_current_electrons_per_s=0.0)


def _drifting_triples(rng: np.random.Generator, camera: Camera, photons: np.ndarray,
                      drift_px: float, runs: int = 4) -> list[np.ndarray]:
    """Raw runs of 3 frames of a scene drifting `drift_px` pixels per frame along x."""
    from scipy.ndimage import shift

    frames = np.stack([shift(photons, (0.0, drift_px * t), order=1, mode="nearest")
                       for t in range(3)])
    return [camera.expose(frames, rng=rng) for _ in range(runs)]


@pytest.mark.parametrize(("level", "drift_px"), [(10.0, 0.3), (40.0, 0.0), (40.0, 1.0)])
def test_gain_of_a_known_camera_with_dark_frames(tmp_path: Path, rng: np.random.Generator,
                                                 level: float, drift_px: float):
    # A camera of our own with known gain (1 count per electron) and offset (100 counts),
    # a slowly drifting scene as in a real video.
    shape = (96, 96)
    photons = _scene(rng, shape, level)
    path = tmp_path / "dark.tif"
    tifffile.imwrite(path, UNIT_GAIN_CAMERA.dark_frames(shape, 40, rng=rng),
                     photometric="minisblack")
    mean, variance, n = dark_statistics(str(path))
    correction = FrameCorrection.build(dark_yx=mean)
    triples = [correction.apply(t) for t in
               _drifting_triples(rng, UNIT_GAIN_CAMERA, photons, drift_px)]
    noise = estimate_frame_noise(triples, correction, dark_variance_yx=variance,
                                 dark_frames=n)
    # Reference: the simulated camera's gain (EMVA 1288 photon-transfer slope = K). The
    # issue asks for 5 %; the standard error here is ~1 % (measured 0.98-1.04 over seeds).
    assert noise.gain_adu_per_electron == pytest.approx(1.0, rel=0.05)


def test_gain_without_dark_frames_is_not_biased_by_shot_noise_skew(rng: np.random.Generator):
    # Without dark frames the slope is a regression of the squared second difference on the
    # mean of the same frames; Poisson noise makes the two co-vary (third cumulant K² q x),
    # which biased the gain upwards by ~10 % at this level before the correction (measured).
    shape = (96, 96)
    photons = _scene(rng, shape, 40.0)
    correction = FrameCorrection.build(
        dark_yx=np.full(shape, UNIT_GAIN_CAMERA.offset_adu, np.float32))
    triples = [correction.apply(t) for t in
               _drifting_triples(rng, UNIT_GAIN_CAMERA, photons, 0.3, runs=8)]
    noise = estimate_frame_noise(triples, correction)
    # Reference: the simulated camera's gain, 1 count per electron; 3 standard errors
    # (~2-3 % each with 8 runs) and at most 8 %.
    assert abs(noise.gain_adu_per_electron - 1.0) <= 3 * noise.gain_stderr
    assert noise.gain_adu_per_electron == pytest.approx(1.0, rel=0.08)


def test_without_dark_frames_a_dim_scene_warns(rng: np.random.Generator):
    shape = (64, 64)
    photons = _scene(rng, shape, 3.0)
    correction = FrameCorrection.build(dark_yx=np.full(shape, CAMERA.offset_adu, np.float32))
    triples = [correction.apply(CAMERA.expose(np.stack([photons] * 3), rng=rng))
               for _ in range(2)]
    with pytest.warns(VolreconWarning, match="give a dark stack"):
        estimate_frame_noise(triples, correction)


def test_given_gain_is_used(rng: np.random.Generator):
    frames = [rng.normal(5.0, 1.0, (3, 16, 16))]
    noise = estimate_frame_noise(frames, FrameCorrection.build(), gain_adu_per_electron=2.5)
    assert noise.gain_adu_per_electron == 2.5


def test_repeated_frames_show_no_shot_noise(rng: np.random.Generator):
    frame = rng.random((32, 32)) * 50
    with pytest.raises(DataError, match="no photon shot noise"):
        estimate_frame_noise([np.stack([frame] * 3)], FrameCorrection.build())


def test_shapes_are_checked(rng: np.random.Generator):
    with pytest.raises(ShapeError, match="at least 3 frames"):
        estimate_frame_noise([], FrameCorrection.build())
    with pytest.raises(ShapeError, match=r"shape \(3, Y, X\)"):
        estimate_frame_noise([rng.random((2, 8, 8))], FrameCorrection.build())
    with pytest.raises(ShapeError, match="dark frames of shape"):
        estimate_frame_noise([rng.random((3, 8, 8))], FrameCorrection.build(),
                             dark_variance_yx=np.ones((4, 4)))
