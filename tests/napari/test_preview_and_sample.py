"""One-frame previews and the sample data, as plain functions (no Qt needed)."""

from __future__ import annotations

import numpy as np
import pytest
import tifffile
from napari_stores import SHAPE_ZYX, gaussian_psf
from scipy.signal import fftconvolve

import volrecon
from volrecon.errors import ConfigError, ShapeError
from volrecon.io import FrameCorrection
from volrecon.napari.preview import preview_frame, preview_window, read_frame, window_bounds
from volrecon.napari.sample import demo_sample, hydrogel_sample, sample_cache_folder
from volrecon.solvers import SolverSettings


@pytest.fixture
def model():
    return volrecon.PSFModel.from_stack(gaussian_psf(SHAPE_ZYX), 2.0, 0.65)


def _bead_frame(model, voxel=(0, 8, 15), photons=500.0):
    # Plane 0: the Gaussian planes nest (a wider one is a narrower one blurred), so only a
    # bead in the sharpest plane has a unique non-negative reconstruction.
    volume = np.zeros(SHAPE_ZYX, np.float32)
    volume[voxel] = photons
    return model.forward(volume)


def test_preview_finds_the_bead_and_its_residual_is_b_minus_av(model):
    frame = _bead_frame(model) + 100.0
    dark = np.full(frame.shape, 100.0, np.float32)
    before = frame.copy()
    result = preview_frame(frame, model, SolverSettings(method="fista", iterations=60),
                           correction=FrameCorrection.build(dark_yx=dark))
    np.testing.assert_array_equal(frame, before)  # input untouched
    assert result.volume_zyx.shape == SHAPE_ZYX and result.volume_zyx.dtype == np.float32
    # Known synthetic truth: the bead sits at voxel (0, 8, 15).
    assert np.unravel_index(result.volume_zyx.argmax(), SHAPE_ZYX) == (0, 8, 15)
    # Reference: b − A v with A v from scipy.signal.fftconvolve (linear), cropped by the
    # centre convention (DESIGN §3). float32 FFTs of values ~1e2: 1e-3 absolute.
    psf = gaussian_psf(SHAPE_ZYX)
    ny, nx = SHAPE_ZYX[1:]
    av = sum(fftconvolve(v, h)[ny // 2:ny // 2 + ny, nx // 2:nx // 2 + nx]
             for v, h in zip(result.volume_zyx.astype(np.float64), psf, strict=True))
    np.testing.assert_allclose(result.residual_yx, (frame - dark) - av, atol=1e-3)
    assert result.info.iterations <= 60 and result.settings.label() == "fista 60 it"


def test_preview_bins_a_full_resolution_frame_like_the_job(model):
    frame = _bead_frame(model)
    # Each model pixel split into 2 × 2 camera pixels of the same value: binning by 2
    # (block mean) gives the frame back exactly.
    raw = np.repeat(np.repeat(frame, 2, axis=0), 2, axis=1)
    settings = SolverSettings(method="fista", iterations=30)
    binned = preview_frame(raw, model, settings, correction=FrameCorrection.build(binning=2))
    direct = preview_frame(frame, model, settings)
    np.testing.assert_allclose(binned.volume_zyx, direct.volume_zyx, rtol=1e-5, atol=1e-5)


def test_read_frame_from_a_tiff(tmp_path, rng):
    frames = rng.integers(0, 4000, (3, 20, 24), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "raw.tif", frames, photometric="minisblack")
    frame = read_frame(tmp_path / "raw.tif", 2)
    assert frame.dtype == np.float32
    np.testing.assert_array_equal(frame, frames[2])


def test_preview_refuses_bad_input(model):
    with pytest.raises(ShapeError, match=r"frame has shape \(5, 5\).*model's sensor"):
        preview_frame(np.ones((5, 5)), model, SolverSettings())
    with pytest.raises(ShapeError, match="but the dark/flat images"):
        preview_frame(np.ones(SHAPE_ZYX[1:]), model, SolverSettings(),
                      correction=FrameCorrection.build(dark_yx=np.ones((2, 2))))
    with pytest.raises(ShapeError, match="must have 2 axes"):
        preview_frame(np.ones(SHAPE_ZYX), model, SolverSettings())
    with pytest.raises(ConfigError, match="method must be one of"):
        SolverSettings(method="magic")
    with pytest.raises(ConfigError, match="iterations must be an integer of at least 1"):
        SolverSettings(iterations=0)
    with pytest.raises(ConfigError, match="tv must be a finite number >= 0"):
        SolverSettings(tv=-1.0)
    assert SolverSettings(iterations=50, tv=0.01, l1=2.0).label() == "admm 50 it, tv 0.01, l1 2"


def test_hydrogel_sample_reconstructs_the_simulated_scene():
    layers = hydrogel_sample(n_frames=3, n_planes=6, iterations=25)
    (recon, recon_kwargs, _), (video, video_kwargs, _), (truth, _, _) = layers
    assert recon.shape == truth.shape == (3, 6, 128, 128) and video.shape == (3, 1, 128, 128)
    assert recon_kwargs["axis_labels"] == ["t", "z", "y", "x"]
    assert recon_kwargs["scale"][1] == 2.0 and video_kwargs["visible"] is False
    # Known synthetic truth: the reconstruction's bright voxels are where the beads and fibre
    # are. Measured correlation with the truth is ~0.6 after 25 iterations; 0.3 leaves room
    # for other noise draws while failing for a misplaced or empty volume (~0).
    correlation = np.corrcoef(recon.ravel(), truth.ravel())[0, 1]
    assert correlation > 0.3


@pytest.mark.slow
def test_demo_sample_runs_the_demo_once_and_opens_its_store(tmp_path, monkeypatch):
    import dask.array as da

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    assert sample_cache_folder() == tmp_path / "cache" / "volrecon" / "napari-demo"
    layers = demo_sample(n_frames=2)
    names = [kwargs["name"] for _, kwargs, _ in layers]
    assert names[0] == "volumes" and "demo raw video" in names and "demo truth" in names
    assert any(n.startswith("demo psf-model") for n in names)
    levels, kwargs, _ = layers[0]
    assert kwargs["multiscale"] and len(levels) == 2  # 128 px: levels "auto" makes two
    volumes = levels[0]
    assert isinstance(volumes, da.Array) and volumes.shape[0] == 2 and volumes.ndim == 4
    assert kwargs["metadata"]["volrecon_store"].startswith(str(tmp_path / "cache"))
    truth = layers[names.index("demo truth")][0]
    assert truth.shape == volumes.shape  # the same grid: the volumes overlay the truth
    # Second call: the finished demo is reused (nothing recomputed, same store).
    again = demo_sample(n_frames=2)
    assert again[0][1]["metadata"]["volrecon_store"] == kwargs["metadata"]["volrecon_store"]


def test_preview_window_of_a_still_bead_and_its_residual(model):
    frames = np.stack([_bead_frame(model)] * 4) + 100.0
    frames[2] += 1.0  # frames differ a little, so the window's frames differ too
    before = frames.copy()
    dark = np.full(frames.shape[1:], 100.0, np.float32)
    settings = SolverSettings(method="admm", iterations=80, temporal_window=4,
                              temporal_weight=0.1)
    result = preview_window(frames, model, settings, index=2,
                            correction=FrameCorrection.build(dark_yx=dark))
    np.testing.assert_array_equal(frames, before)  # input untouched
    # Known synthetic truth: the bead sits at voxel (0, 8, 15).
    assert np.unravel_index(result.volume_zyx.argmax(), SHAPE_ZYX) == (0, 8, 15)
    # Reference: b − A v with A v from scipy.signal.fftconvolve, as for a single frame.
    psf = gaussian_psf(SHAPE_ZYX)
    ny, nx = SHAPE_ZYX[1:]
    av = sum(fftconvolve(v, h)[ny // 2:ny // 2 + ny, nx // 2:nx // 2 + nx]
             for v, h in zip(result.volume_zyx.astype(np.float64), psf, strict=True))
    np.testing.assert_allclose(result.residual_yx, (frames[2] - dark) - av, atol=1e-3)
    assert window_bounds(2, 4, 4) == (0, 4) and window_bounds(50, 60, 8) == (46, 54)
    with pytest.raises(ShapeError, match="outside the window of 4 frames"):
        preview_window(frames, model, settings, index=4)
    with pytest.raises(ShapeError, match="model's sensor"):
        preview_window(frames[:, :5], model, settings, index=0)
    with pytest.raises(ShapeError, match="3 axes"):
        preview_window(frames[0], model, settings, index=0)
