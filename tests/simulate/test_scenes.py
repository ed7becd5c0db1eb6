"""Scenes: photon bookkeeping, sub-voxel positions and smooth bounded motion."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from scipy.special import erf

from volrecon.errors import ConfigError, ShapeError
from volrecon.simulate import (
    Scene,
    bead_scene,
    blob_scene,
    filament_scene,
    render_points,
    smooth_motion,
)


@pytest.mark.parametrize("shape", [(1, 17, 24), (9, 32, 31)])
def test_render_points_conserves_photons_and_places_centroids(rng, shape):
    """Known truth: each spot's integral is its photon count, its centroid its position."""
    positions = np.array([[shape[0] / 2 - 0.3, 8.37, 10.81]])
    photons = np.array([1234.5])
    volume = render_points(positions, photons, shape, sigma_zyx_voxels=(0.6, 1.2, 0.9))
    assert volume.shape == shape and volume.dtype == np.float32
    if shape[0] == 1:
        # One plane keeps the part of the Gaussian between its faces (normal CDF via erf).
        kept = 0.5 * (erf((0.5 - (positions[0, 0] - 0)) / (0.6 * np.sqrt(2)))
                      - erf((-0.5 - (positions[0, 0] - 0)) / (0.6 * np.sqrt(2))))
        assert volume.sum() == pytest.approx(1234.5 * kept, rel=1e-5)
    else:
        assert volume.sum() == pytest.approx(1234.5, rel=1e-5)
        # Reference estimator: scipy.ndimage.center_of_mass. Binning a Gaussian into voxels
        # shifts its centroid by at most exp(-2 pi^2 sigma^2) / pi (Fourier series of the
        # rounding error): 2.6e-4 voxel for sigma = 0.6, nothing for the wider axes.
        bound = np.exp(-2 * np.pi**2 * np.array([0.6, 1.2, 0.9]) ** 2) / np.pi + 1e-6
        error = np.abs(ndimage.center_of_mass(volume.astype(np.float64)) - positions[0])
        assert np.all(error <= bound), error


def test_render_points_matches_sum_of_single_points(rng):
    positions = rng.uniform([1, 4, 4], [7, 28, 28], size=(5, 3))
    photons = rng.uniform(10, 100, size=5)
    together = render_points(positions, photons, (8, 32, 32), sigma_zyx_voxels=(0.5, 1.0, 1.0))
    apart = sum(render_points(p[None], [w], (8, 32, 32), sigma_zyx_voxels=(0.5, 1.0, 1.0))
                for p, w in zip(positions, photons, strict=True))
    np.testing.assert_allclose(together, apart, rtol=1e-5, atol=1e-6)


def test_smooth_motion_drifts_and_wobbles_smoothly():
    start = np.array([[4.0, 20.0, 30.0], [5.0, 40.0, 10.0]])
    drift = (0.05, 0.2, -0.1)
    amp = (0.2, 1.0, 1.0)
    track = smooth_motion(start, 50, drift_zyx_per_frame=drift, wobble_voxels=amp,
                          wobble_period_frames=20.0, rng=1)
    assert track.shape == (50, 2, 3)
    np.testing.assert_allclose(track[0], start)  # the wobble starts at zero
    # Known bound: |dp/dt| <= |drift| + 2 pi A / P_min with P_min = 0.7 * 20 frames.
    step = np.abs(np.diff(track, axis=0))
    assert np.all(step <= np.abs(drift) + 2 * np.pi * np.asarray(amp) / 14.0 + 1e-9)
    # The mean displacement per frame is the drift (the wobble averages out over periods).
    slope = np.polyfit(np.arange(50), track[:, :, 1].mean(axis=1), 1)[0]
    assert slope == pytest.approx(0.2, abs=0.05)


def test_bead_scene_positions_and_photons_are_the_truth():
    scene = bead_scene((8, 48, 48), 5, n_beads=6, photons=1000.0, rng=3,
                       margin_voxels=(1.5, 8.0, 8.0), drift_zyx_per_frame=(0.0, 0.5, 0.0))
    assert scene.volumes_tzyx.shape == (5, 8, 48, 48) and scene.kinds == ("bead",) * 6
    assert scene.positions_tnzyx.shape == (5, 6, 3) and scene.photons_n.shape == (6,)
    assert np.all((scene.photons_n >= 500) & (scene.photons_n <= 1500))
    # Each bead's photons are in the volume (beads sit >= 1.5 voxels from the faces, so at
    # most a tail of 1.5 / 0.4 = 3.75 sigma along z is lost).
    for t in range(5):
        assert scene.volumes_tzyx[t].sum() == pytest.approx(scene.photons_n.sum(), rel=1e-3)
    # Every bead moved by exactly the drift between frames (no wobble asked for).
    np.testing.assert_allclose(np.diff(scene.positions_tnzyx, axis=0)[..., 1], 0.5)
    # The brightest voxel of each bead is the voxel nearest its true centre.
    for (z, y, x) in np.rint(scene.positions_tnzyx[0]).astype(int):
        assert scene.volumes_tzyx[0, z, y, x] > 0.1 * scene.photons_n.min()
    assert not scene.volumes_tzyx.flags.writeable


def test_filament_carries_photons_per_unit_length():
    scene = filament_scene((8, 64, 64), 3, photons_per_voxel=100.0, length_voxels=30.0,
                           bend_voxels=0.0, flex_voxels=0.0, depth_swing_voxels=0.0, rng=2)
    # Known truth: a straight fibre of chord 30 voxels with no bends carries 30 * 100 photons
    # (its cross-section is well inside the grid).
    for t in range(3):
        assert scene.volumes_tzyx[t].sum() == pytest.approx(3000.0, rel=1e-3)
    assert scene.positions_tnzyx.shape == (3, 0, 3) and scene.kinds == ()
    bent = filament_scene((8, 64, 64), 4, rng=2)
    # A bent fibre is longer than its chord, and it changes shape over time.
    assert bent.volumes_tzyx[0].sum() > 0.6 * 64 * 2e4
    assert not np.allclose(bent.volumes_tzyx[0], bent.volumes_tzyx[3])


def test_blobs_stay_inside_the_grid():
    scene = blob_scene((10, 40, 40), 60, n_blobs=4, rng=4)
    pos = scene.positions_tnzyx
    assert np.all(pos >= 0) and np.all(pos <= np.array([9, 39, 39]))
    assert scene.kinds == ("blob",) * 4


def test_scenes_overlay():
    a = bead_scene((4, 32, 32), 2, n_beads=2, rng=0)
    b = blob_scene((4, 32, 32), 2, n_blobs=1, rng=1, sigma_zyx_voxels=(0.5, 1.0, 1.0),
                   travel_voxels=(0.5, 2.0, 2.0))
    c = a + b
    np.testing.assert_allclose(c.volumes_tzyx, a.volumes_tzyx + b.volumes_tzyx)
    assert c.kinds == ("bead", "bead", "blob") and c.positions_tnzyx.shape == (2, 3, 3)
    with pytest.raises(ShapeError, match="overlay"):
        _ = a + bead_scene((4, 32, 32), 3, n_beads=1, rng=0)


def test_scene_errors():
    with pytest.raises(ShapeError, match="positions_tnzyx"):
        Scene(np.zeros((2, 1, 4, 4)), np.zeros((2, 3, 3)), np.zeros(2), ("bead", "bead"))
    with pytest.raises(ConfigError, match="sigma_zyx_voxels"):
        render_points(np.zeros((1, 3)), [1.0], (2, 4, 4), sigma_zyx_voxels=(0.0, 1.0, 1.0))
    with pytest.raises(ShapeError, match="one photon count"):
        render_points(np.zeros((2, 3)), [1.0], (2, 4, 4), sigma_zyx_voxels=(1.0, 1.0, 1.0))
    with pytest.raises(ConfigError, match="margin_voxels"):
        bead_scene((4, 8, 8), 1, margin_voxels=(3.0, 8.0, 8.0))
    with pytest.raises(ConfigError, match="n_frames"):
        bead_scene((4, 8, 8), 0)
