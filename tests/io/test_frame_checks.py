"""Input sanity checks of sampled frames: offset against the dark, hot pixels and their repair."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage

from volrecon.errors import DataError, FrameOffsetWarning
from volrecon.io import FrameCorrection, check_offset, find_hot_pixels
from volrecon.io.checks import estimate_zero_level

SHAPE = (5, 40, 48)


def _beads(rng, *, offset=100.0, sigma=2.0):
    """Frames of a few Gaussian spots (sigma 1.5 px) over `offset`, Gaussian read noise."""
    yy, xx = np.mgrid[: SHAPE[1], : SHAPE[2]]
    light = sum(300 * np.exp(-((yy - y) ** 2 + (xx - x) ** 2) / (2 * 1.5**2))
                for y, x in ((10, 12), (25, 30), (33, 8)))
    return offset + light + rng.normal(0.0, sigma, SHAPE)


def test_correct_dark_passes_silently(rng):
    frames = np.round(_beads(rng)).astype(np.uint16)
    # Known truth: noise puts about half of the dark pixels below the offset; no message.
    figures = check_offset(frames, np.full(SHAPE[1:], 100.0, np.float32), video="v.tif",
                           dark="d.tif")
    assert 0.3 < figures.negative_fraction < 0.6
    assert figures.sigma == pytest.approx(2.0, rel=0.2)  # the read noise put in


def test_frames_below_the_dark_refused_naming_both_files(rng):
    frames = np.clip(_beads(rng) / 16, 0, 255).astype(np.uint8)  # 8-bit video ...
    dark = np.full(SHAPE[1:], 1600.0, np.float32)  # ... with a 16-bit camera's dark
    with pytest.raises(DataError, match=r"v8\.tif: 100% of the sampled pixels are below zero "
                                        r"after subtracting the dark d16\.tif.*remove "
                                        r"\[video\] dark"):
        check_offset(frames, dark, video="v8.tif", dark="d16.tif")


def test_dark_subtracted_twice_warns_with_the_fraction(rng):
    frames = (_beads(rng) - 100.0).astype(np.float32)  # offset-subtracted already
    with pytest.warns(FrameOffsetWarning, match=r"9\d% of the sampled pixels are below zero.*"
                                                r"video itself is \d+% negative.*subtracted "
                                                r"twice: remove \[video\] dark"):
        check_offset(frames, np.full(SHAPE[1:], 100.0, np.float32), video="v.tif",
                     dark="d.tif")


def test_dark_too_high_warns(rng):
    frames = np.round(_beads(rng)).astype(np.uint16)
    # A dark 3 sigma too high: 99.9 % of the dark pixels below zero, the median only 3
    # sigma below (not refused: the refusal needs 5).
    with pytest.warns(FrameOffsetWarning, match="dark is higher than the video's offset"):
        check_offset(frames, np.full(SHAPE[1:], 106.0, np.float32), video="v.tif",
                     dark="d.tif")


def test_missing_dark_warns_only_for_a_flat_pedestal(rng):
    with pytest.warns(FrameOffsetWarning, match=r"no \[video\] dark is given.*flat pedestal "
                                                r"of about 9\d counts"):
        check_offset(np.round(_beads(rng)).astype(np.uint16), None, video="v.tif")
    # No offset: nothing to say.
    check_offset(_beads(rng, offset=0.0).astype(np.float32), None, video="v.tif")
    # Scene light over the whole sensor (a ramp from 50 to 250 counts) is no pedestal.
    ramp = np.linspace(50, 250, SHAPE[2])[None, None, :]
    check_offset((_beads(rng, offset=0.0) + ramp).astype(np.float32), None, video="v.tif")


def _scenario_video(writer, folder, **options):
    """The simulated video (5 frames) and the mean of its dark frames, as float64."""
    import tifffile

    scenario = writer(folder, n_frames=5, rng=4, **options)
    video = tifffile.imread(scenario.files["video"]).astype(np.float64)
    dark = tifffile.imread(scenario.files["dark"]).astype(np.float64).mean(axis=0)
    return video, dark


@pytest.mark.parametrize("gain", [0.5, 2.0])
def test_diffuser_video_without_a_dark_warns_of_the_offset(tmp_path, gain):
    from volrecon.simulate import write_hydrogel_scenario
    from volrecon.simulate.camera import Camera

    # Known truth: the simulated camera adds offset_adu = 100 counts to every pixel. Behind
    # the diffuser no pixel is dark (the darkest sit ~3 counts above the offset at gain 0.5,
    # ~12 at gain 2), so the pedestal rule cannot see it; the noise can.
    camera = Camera(gain_adu_per_electron=gain, read_noise_electrons=1.6 * gain ** 0.5)
    video, dark = _scenario_video(write_hydrogel_scenario, tmp_path, n_planes=8,
                                  camera=camera)
    with pytest.warns(FrameOffsetWarning) as caught:
        figures = check_offset(video.astype(np.uint16), None, video="gel.tif")
    message, = (str(w.message) for w in caught)
    assert message.startswith("gel.tif: no [video] dark is given, but zero light sits at")
    assert "set [video] dark" in message and "or subtract about" in message
    # The level errs low by (read noise in counts)² / gain, under 2 counts here; structure
    # of the caustics moved it by up to 14 counts (gain 2) in the simulations tried, so 15.
    assert figures.zero_level == pytest.approx(camera.offset_adu, abs=15.0)
    assert f"{figures.zero_level:.4g} counts" in message
    # The same frames with their dark subtracted, by the job or beforehand: no warning.
    check_offset(video, dark, video="gel.tif", dark="dark.tif")
    check_offset((video - dark).astype(np.float32), None, video="gel-minus-dark.tif")


def test_light_field_video_keeps_the_pedestal_rule(tmp_path):
    from volrecon.simulate import write_lenslet_scenario

    # Light between the lenslet images leaves dark pixels: the flat pedestal (the camera's
    # 100 counts) is what is reported, as before, and nothing once the dark is subtracted.
    video, dark = _scenario_video(write_lenslet_scenario, tmp_path)
    with pytest.warns(FrameOffsetWarning, match="flat pedestal of about 100 counts") as caught:
        check_offset(video.astype(np.uint16), None, video="lf.tif")
    assert len(caught) == 1
    check_offset(video, dark, video="lf.tif", dark="dark.tif")
    check_offset((video - dark).astype(np.float32), None, video="lf-minus-dark.tif")


def test_zero_level_of_pure_shot_noise_is_its_offset(rng):
    # Known truth: y = c + K·Poisson(λ) has Var = K (E[y] − c) (Poisson variance = mean), so
    # the line through (mean, variance) reaches zero variance at c. A smooth ramp of light
    # (2 to 200 photons across the frame) gives the range of means; 100 frames' worth of
    # 8 x 8 blocks put the level within ~1 count of c = 250.
    ramp = np.linspace(2.0, 200.0, 96)[None, :] * np.ones((96, 1))
    frames = 250.0 + 0.7 * rng.poisson(ramp, (6, 96, 96))
    assert estimate_zero_level(frames) == pytest.approx(250.0, abs=1.5)
    # Without shot noise (Gaussian read noise of constant sigma) the noise says nothing.
    assert estimate_zero_level(250.0 + ramp + rng.normal(0.0, 2.0, (6, 96, 96))) is None
    # Too few blocks (a 24 x 24 video): no estimate.
    assert estimate_zero_level(frames[:2, :24, :24]) is None


@pytest.mark.parametrize("dark", [False, True])
def test_hot_pixels_found_but_sharp_light_kept(rng, dark):
    frames = _beads(rng)
    yy, xx = np.mgrid[: SHAPE[1], : SHAPE[2]]
    # A well-sampled sharp spot (sigma 0.8 px, neighbours at 46 % of its peak) is light.
    frames += 2000 * np.exp(-((yy - 20) ** 2 + (xx - 40) ** 2) / (2 * 0.8**2))
    truth = np.array([[0, 5], [7, 44], [30, 20]])
    frames[:, truth[:, 0], truth[:, 1]] += [400.0, 60.0, 1000.0]  # 60: 30 sigma
    frames[2, 12, 12] += 5000  # a cosmic ray in one frame only: not a hot pixel
    found = find_hot_pixels(np.round(frames).astype(np.uint16),
                            dark_yx=np.full(SHAPE[1:], 100.0) if dark else None)
    # Known truth: the three pixels put in, in row-major order.
    np.testing.assert_array_equal(found, truth)


def test_repair_is_the_median_of_the_neighbours(rng):
    frames = rng.random((3, 9, 11)).astype(np.float32)
    pixels = np.array([[0, 0], [4, 5], [8, 10], [0, 6]])
    repaired = FrameCorrection().with_hot_pixels(pixels).apply(frames)
    # Reference: scipy.ndimage.generic_filter with numpy.median over the 8 neighbours,
    # mirrored at the edges (the mean of the middle two of the 8 values).
    ring = np.ones((3, 3), bool)
    ring[1, 1] = False
    expected = frames.copy()
    for t in range(3):
        median = scipy.ndimage.generic_filter(frames[t], np.median, footprint=ring,
                                              mode="mirror")
        expected[t][tuple(pixels.T)] = median[tuple(pixels.T)]
    np.testing.assert_allclose(repaired, expected, rtol=1e-6)
    assert not np.shares_memory(repaired, frames)
    np.testing.assert_array_equal(FrameCorrection().apply(frames), frames)
