"""Files written by the simulated camera: TIFF layout, manifest, and consistency with the truth."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile
from skimage.registration import phase_cross_correlation

from volrecon import PSFModel
from volrecon.errors import ConfigError, InputFileError, ShapeError
from volrecon.simulate import (
    Camera,
    MicroscopeDesign,
    expected_photons,
    read_scenario,
    record_bead_scan,
    record_video,
    write_hydrogel_scenario,
    write_tiff,
)

SMALL = MicroscopeDesign(shape_yx=(64, 64), pupil_radius_um=100.0, wavelength_samples=2)


def _read(path):
    with tifffile.TiffFile(path) as tf:
        series = tf.series[0]
        return series.asarray(), series.axes, tf.shaped_metadata[0], len(tf.pages)


@pytest.mark.parametrize(("axes", "shape"), [("YX", (5, 7)), ("TYX", (3, 5, 7)),
                                             ("ZYX", (2, 5, 7)), ("TZYX", (2, 3, 5, 7))])
def test_write_tiff_reads_back_with_tifffile(tmp_path, rng, axes, shape):
    data = rng.integers(0, 65535, size=shape, dtype=np.uint16)
    path = tmp_path / "x.tif"
    write_tiff(path, data, axes=axes, metadata={"pixel_size_um": 0.5})
    back, found_axes, meta, pages = _read(path)
    assert found_axes == axes and back.dtype == np.uint16
    np.testing.assert_array_equal(back, data)
    assert meta["pixel_size_um"] == 0.5
    assert pages == int(np.prod(shape[:-2]))


def test_write_tiff_rejects_wrong_axes(tmp_path):
    with pytest.raises(ShapeError, match="axes"):
        write_tiff(tmp_path / "x.tif", np.zeros((2, 3, 4), np.uint16), axes="YX")
    with pytest.raises(ShapeError, match="axes"):
        write_tiff(tmp_path / "x.tif", np.zeros((2, 3, 4), np.uint16), axes="YXT")


def test_default_scenario_writes_what_a_camera_would(tmp_path):
    s = write_hydrogel_scenario(tmp_path / "run", rng=0, workers=2)
    z, y, x = s.shape_zyx
    assert (z, y, x) == (16, 128, 128) and s.n_frames == 40
    video, axes, meta, pages = _read(s.files["video"])
    assert video.shape == (40, 128, 128) and video.dtype == np.uint16 and axes == "TYX"
    assert pages == 40 and meta["frame_interval_s"] == s.frame_interval_s
    assert meta["pixel_size_um"] == pytest.approx(s.pixel_size_um)
    scan, axes, meta, _ = _read(s.files["psf_scan"])
    assert scan.shape == (16, 128, 128) and scan.dtype == np.uint16 and axes == "ZYX"
    assert meta["depth_step_um"] == 2.0 and meta["depth_start_um"] == -15.0
    dark, axes, _, _ = _read(s.files["dark"])
    assert dark.dtype == np.uint16 and axes == "TYX" and dark.shape[1:] == (128, 128)
    truth = np.load(s.files["truth_volumes"], allow_pickle=False)
    assert truth.shape == (40, 16, 128, 128) and truth.dtype == np.float32
    positions = np.load(s.files["truth_positions"], allow_pickle=False)
    assert positions.shape == (40, s.n_beads, 3)
    assert np.all(positions >= 0) and np.all(positions <= np.array([15, 127, 127]))
    # The video is not saturated and carries signal well above the read noise.
    assert video.max() < s.camera.max_adu and video.mean() > s.camera.offset_adu + 10


def test_video_mean_matches_the_camera_model_of_the_truth(tmp_path):
    """Mean counts = offset + K (eta mu_p + dark): EMVA 1288's linear model, over all pixels."""
    camera = Camera(hot_pixel_fraction=0.0)
    s = write_hydrogel_scenario(tmp_path, rng=1, design=SMALL, camera=camera, n_frames=6,
                                n_planes=4, workers=1)
    video = tifffile.imread(s.files["video"]).astype(np.float64)
    photons = np.load(s.files["truth_frames_photons"])
    expected = camera.expected_adu(photons)
    variance = camera.gain_adu_per_electron**2 * (
        camera.quantum_efficiency * photons + camera.read_noise_electrons**2) + 1 / 12
    # The mean residual over N pixels has standard error sqrt(mean variance / N); allow 5.
    n = video.size
    assert abs((video - expected).mean()) < 5 * np.sqrt(variance.mean() / n)
    # Normalised residuals have unit variance (Poisson + Gaussian model is complete).
    assert np.var((video - expected) / np.sqrt(variance)) == pytest.approx(1.0, abs=0.03)
    # The noise-free photons are the model applied to the truth volumes (files agree).
    model = PSFModel.from_stack(np.load(s.files["truth_psf"]), s.depth_step_um, s.pixel_size_um)
    again = expected_photons(np.load(s.files["truth_volumes"]), model,
                             background_photons=s.background_photons)
    np.testing.assert_allclose(again, photons, rtol=1e-4, atol=1e-3)


def test_psf_scan_is_the_truth_psf_shifted_by_the_bead_offset(tmp_path):
    """Known truth: the scan bead sat at `bead_offset_yx_um`; the pattern moves by it.

    Reference estimator: skimage.registration.phase_cross_correlation (upsampled).
    """
    s = write_hydrogel_scenario(tmp_path, rng=2, design=SMALL, n_frames=2, n_planes=4,
                                workers=1)
    scan = tifffile.imread(s.files["psf_scan"]).astype(np.float64)
    dark = tifffile.imread(s.files["dark"]).astype(np.float64).mean(axis=0)
    truth = np.load(s.files["truth_psf"])
    expected = np.asarray(s.bead_offset_yx_um) / s.pixel_size_um  # pixels on the sensor
    assert np.abs(expected).max() > 0.5  # the scan really is off centre
    for plane_scan, plane_truth in zip(scan - dark, truth, strict=True):
        shift, _, _ = phase_cross_correlation(plane_scan, plane_truth, upsample_factor=20)
        # 0.15 pixel: shot noise on a bright scan; the estimator's own step is 0.05 pixel.
        np.testing.assert_allclose(shift, expected, atol=0.15)
    # Offset subtracted, the scan is the truth PSF times the detected photons.
    detected = s.psf_scan_camera.gain_adu_per_electron * s.psf_scan_camera.quantum_efficiency
    assert scan.max() > 100 + 50 * detected


def test_scenario_manifest_round_trip_and_reproducibility(tmp_path):
    a = write_hydrogel_scenario(tmp_path / "a", rng=3, design=SMALL, n_frames=2, n_planes=2,
                                workers=1)
    b = write_hydrogel_scenario(tmp_path / "b", rng=3, design=SMALL, n_frames=2, n_planes=2,
                                workers=1)
    assert read_scenario(tmp_path / "a") == a
    manifest = json.loads(a.files["manifest"].read_text())
    assert manifest["files"]["video"] == "video.tif" and manifest["seed"] == 3
    np.testing.assert_array_equal(tifffile.imread(a.files["video"]),
                                  tifffile.imread(b.files["video"]))
    np.testing.assert_array_equal(tifffile.imread(a.files["psf_scan"]),
                                  tifffile.imread(b.files["psf_scan"]))


def test_read_scenario_errors(tmp_path):
    with pytest.raises(InputFileError, match=r"scenario\.json"):
        read_scenario(tmp_path)
    (tmp_path / "scenario.json").write_text('{"format": "other"}')
    with pytest.raises(InputFileError, match="'format'"):
        read_scenario(tmp_path)
    s = write_hydrogel_scenario(tmp_path / "s", rng=0, design=SMALL, n_frames=1, n_planes=1,
                                workers=1)
    s.files["dark"].unlink()
    with pytest.raises(InputFileError, match=r"dark\.tif"):
        read_scenario(tmp_path / "s")


def test_recording_functions_and_errors(rng):
    psf = np.zeros((2, 16, 16), np.float32)
    psf[:, 8, 8] = 0.5
    model = PSFModel.from_stack(psf, 1.0, 1.0)
    volumes = np.zeros((3, 2, 16, 16), np.float32)
    volumes[:, 1, 4, 5] = 1e4
    camera = Camera(read_noise_electrons=0.0, dark_current_electrons_per_s=0.0)
    frames = record_video(volumes, model, camera, rng=0)
    assert frames.shape == (3, 16, 16) and frames.dtype == np.uint16
    # Known truth: 1e4 photons * 0.5 at (4, 5), detected with eta = 0.8, K = 0.5: 2000 ADU.
    assert abs(frames[:, 4, 5].astype(float).mean() - (100 + 2000)) < 3 * np.sqrt(0.25 * 4000)
    scan = record_bead_scan(psf, camera, bead_photons=100.0, rng=0)
    assert scan.shape == (2, 16, 16) and scan.dtype == np.uint16
    with pytest.raises(ShapeError, match="T, Z, Y, X"):
        expected_photons(volumes[0], model)
    with pytest.raises(ConfigError, match="bead_photons"):
        record_bead_scan(psf, camera, bead_photons=0.0)
    with pytest.raises(ConfigError, match="frame_interval_s"):
        write_hydrogel_scenario("unused", frame_interval_s=0.0)
