"""Input sanity checks of sampled frames: offset against the dark, hot pixels and their repair."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage

from volrecon.errors import DataError, FrameOffsetWarning
from volrecon.io import FrameCorrection, check_offset, find_hot_pixels

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
