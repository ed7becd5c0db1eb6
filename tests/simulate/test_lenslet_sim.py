"""The simulated light-field microscope with its lenslet array at the image plane."""

from __future__ import annotations

import math

import numpy as np
import pytest
import tifffile
from scipy.special import j1

import volrecon
from volrecon.errors import ConfigError, ShapeError
from volrecon.models import LensletPSF
from volrecon.simulate import propagate
from volrecon.simulate.lenslet import (
    LensletDesign,
    _image_plane_fields,
    lenslet_point_images,
    lenslet_psf_stack,
)
from volrecon.simulate.scenario import read_scenario, write_lenslet_scenario
from volrecon.simulate.scoring import blurred_correlation

# One wavelength: the closed forms below are monochromatic.
MONO = {"wavelength_samples": 1, "bandwidth_um": 0.0}


def _solid_angle_fraction(na: float, n: float) -> float:
    # Textbook: the cone of half-angle θ (sin θ = NA / n) holds (1 − cos θ) / 2 of 4π.
    return 0.5 * (1.0 - math.sqrt(1.0 - (na / n) ** 2))


def test_focal_spot_of_one_lenslet_is_the_square_aperture_fraunhofer_pattern():
    design = LensletDesign(shape_yx=(15, 15), oversample=8, **MONO)
    cell = design.lenslet_pitch * design.oversample
    grid = (3 * cell, 3 * cell)
    mask = design.lenslet_mask(grid)
    dx, wave, f, p = design.grid_pixel_um(), design.wavelength_um, design.focal_length_um, \
        design.pitch_um
    x = (np.arange(grid[1]) - 1.5 * cell + 0.5) * dx  # from the middle cell's centre
    for tilt in (0.0, 0.01):
        # A plane wave (tilted by `tilt` radians along x) through the middle lenslet only.
        field = np.zeros(grid, np.complex64)
        field[cell:2 * cell, cell:2 * cell] = np.exp(2j * np.pi * math.sin(tilt) / wave * x)[
            cell:2 * cell]
        sensor = propagate(field * mask.transmittance(wave), f, wavelength_um=wave,
                           pixel_size_um=dx)
        intensity = np.abs(sensor) ** 2
        row = intensity[int(1.5 * cell)] + intensity[int(1.5 * cell) - 1]  # straddle the centre
        # Goodman, Fourier Optics §5.2: the back focal plane holds the aperture's Fraunhofer
        # pattern, sinc²(p (x − f tan θ) / (λ f)) for a square of side p, centred on the ray
        # through the lens centre at the tilt angle θ.
        shift = f * math.tan(tilt)
        centre = int(np.argmin(abs(x - shift)))
        lobe = abs(x - shift) < wave * f / p
        centroid = float((row[lobe] * x[lobe]).sum() / row[lobe].sum())
        assert centroid == pytest.approx(shift, abs=0.05 * dx)
        expected = np.sinc(p * (x - shift) / (wave * f)) ** 2
        near = abs(x - shift) < 2.5 * wave * f / p
        # 3 % of the peak: the angular spectrum is exact where the closed form is paraxial,
        # and the pixels straddling the centre row average the pattern over ±dx/2.
        np.testing.assert_allclose(row[near] / row[centre], expected[near] / expected[centre],
                                   atol=0.03)


def test_in_focus_field_at_the_array_is_the_airy_pattern():
    design = LensletDesign(shape_yx=(16, 16), oversample=8, **MONO)
    side = 256
    field = _image_plane_fields(design, 0.0, np.array([[8.0, 8.0]]), wavelength_um=0.52,
                                grid=(side, side), origin=(0, 0), workers=1)[0]
    intensity = np.abs(field.astype(np.complex128)) ** 2
    dx = design.grid_pixel_um()
    centre = (8.5 * design.sensor_pixel_um - 0.5 * dx) / dx  # the point's image, grid index
    r = np.hypot(*np.meshgrid((np.arange(side) - centre) * dx,
                              (np.arange(side) - centre) * dx, indexing="ij"))
    # Goodman §4.4.2: a circular pupil of image-side NA gives [2 J1(v) / v]²,
    # v = 2π NA r / λ; first zero at r = 0.61 λ / NA.
    na_image = design.numerical_aperture / design.magnification
    v = 2 * np.pi * na_image * r / 0.52
    airy = np.where(v > 0, (2 * j1(np.maximum(v, 1e-12)) / np.maximum(v, 1e-12)) ** 2, 1.0)
    near = r < 2 * 0.61 * 0.52 / na_image
    peak = intensity.max()
    # 2 %: the sampled pupil disc's edge pixels are weighted by their covered fraction.
    np.testing.assert_allclose(intensity[near] / peak, airy[near], atol=0.02)
    # Power: the emitter's light inside the objective's cone (units µm²).
    assert float(intensity.sum()) * dx * dx == pytest.approx(
        _solid_angle_fraction(design.numerical_aperture, design.immersion_index), rel=1e-5)


@pytest.fixture(scope="module")
def small_design():
    return LensletDesign(shape_yx=(36, 36), lenslet_pitch=4, **MONO)


@pytest.fixture(scope="module")
def small_stack(small_design):
    return lenslet_psf_stack(small_design, small_design.depths_um(5, 1.5), workers=1)


def test_stack_follows_the_model_convention(small_design, small_stack):
    psf = small_stack.psf
    assert psf.shape == (5, 4, 4, 36, 36) and psf.dtype == np.float32
    y0, x0 = small_design.block_origin_yx
    assert (y0, x0) == (16, 16)
    # The light reaching the sensor is the light in the objective's cone (textbook solid
    # angle); 1.5 % for what falls beside the 36-pixel sensor or outside the band limit.
    efficiency = _solid_angle_fraction(0.5, 1.33)
    np.testing.assert_allclose(psf.sum(axis=(-2, -1)), efficiency, rtol=0.015)
    # In focus, the f-number-matched lenslet images the pupil onto its own N × N block
    # (geometric optics), so most light of a point near a lenslet's centre lands under it;
    # points near a corner share their Airy disc (as wide as a lenslet) with neighbours.
    # Defocus spreads the light over more lenslets.
    own = psf[:, :, :, y0:y0 + 4, x0:x0 + 4].sum(axis=(-2, -1)) / psf.sum(axis=(-2, -1))
    assert own[2, 1:3, 1:3].min() > 0.8 and own[2].min() > 0.5
    assert (own[0] < own[1]).all() and (own[4] < own[3]).all()
    assert own[[0, 4]].max() < 0.65


def test_responses_repeat_one_lenslet_further(small_design, small_stack):
    y0, x0 = small_design.block_origin_yx
    depths = small_stack.depths_um[[0, 3]]
    moved = lenslet_point_images(small_design, depths, [(y0 + 1 + 4, x0 + 3 - 8)], workers=1)
    # Known shift: one lenslet down and two left moves the image by (4, -8) pixels.
    expected = np.roll(small_stack.psf[[0, 3], 1, 3], (4, -8), axis=(-2, -1))
    scale = float(expected.max())
    np.testing.assert_allclose(moved[:, 0, 4:, :-8], expected[:, 4:, :-8], atol=2e-3 * scale)


def test_model_of_the_stack(small_stack):
    model = small_stack.to_model()
    assert isinstance(model, LensletPSF) and model.lenslet_pitch == 4
    assert model.geometry.depth_step_um == pytest.approx(1.5)
    assert model.geometry.pixel_size_um == pytest.approx(0.325)
    assert model.geometry.depth_start_um == pytest.approx(-3.0)


def test_reconstruction_beats_the_adjoint(rng, small_stack):
    model = small_stack.to_model()
    truth = np.zeros(model.shape_in, np.float32)
    for z, y, x in zip(rng.integers(0, 5, 8), rng.integers(8, 28, 8), rng.integers(8, 28, 8),
                       strict=True):
        truth[z, y, x] += 1e5 * (0.5 + rng.random())
    photons = np.asarray(model.forward(truth)) + 2.0
    frame = rng.poisson(photons).astype(np.float32) - 2.0
    scores = {
        "adjoint": blurred_correlation(model.adjoint(frame), truth),
        "fista-1": blurred_correlation(
            volrecon.reconstruct(frame, model, method="fista", iterations=1), truth),
        "fista": blurred_correlation(
            volrecon.reconstruct(frame, model, method="fista", iterations=150), truth),
        "rl": blurred_correlation(
            volrecon.reconstruct(frame, model, method="rl", iterations=150), truth),
    }
    # Known truth: eight beads at known voxels, shot noise. 0.8 is reached by both solvers
    # (about 0.9) and missed by the adjoint and one FISTA step (about 0.5), which leave the
    # beads smeared over their lenslets and depths.
    assert scores["fista"] > 0.8 and scores["rl"] > 0.8, scores
    assert scores["adjoint"] < 0.7 and scores["fista-1"] < 0.7, scores


def test_scenario_files_round_trip(tmp_path):
    design = LensletDesign(shape_yx=(32, 32), lenslet_pitch=4, **MONO)
    scenario = write_lenslet_scenario(tmp_path / "lf", design=design, n_frames=3, n_planes=3,
                                      n_beads=3, dark_frames=2, workers=1)
    assert read_scenario(tmp_path / "lf") == scenario
    scan = tifffile.imread(scenario.files["psf_scan"])
    assert scan.shape == (3, 4, 4, 32, 32) and scan.dtype == np.uint16
    truth_psf = np.load(scenario.files["truth_psf"])
    assert truth_psf.shape == (3, 4, 4, 32, 32)
    # The bead scan records the truth (known synthetic PSF) through camera noise: every
    # image correlates with its response, and each depth's images best with their own depth.
    images, truths = scan.reshape(48, -1).astype(np.float64), truth_psf.reshape(48, -1)
    own = [np.corrcoef(images[k], truths[k])[0, 1] for k in range(48)]
    assert np.median(own) > 0.9
    by_depth = np.corrcoef(images.reshape(3, 16, -1).mean(axis=1),
                           truths.reshape(3, 16, -1).mean(axis=1))[:3, 3:]
    assert (by_depth.argmax(axis=1) == np.arange(3)).all()
    assert np.load(scenario.files["truth_volumes"]).shape == (3, 3, 32, 32)


@pytest.mark.parametrize(("kwargs", "error", "match"), [
    ({"lenslet_pitch": 0}, ConfigError, "lenslet_pitch must be a positive integer"),
    ({"numerical_aperture": 1.4}, ConfigError, "below the immersion index"),
    ({"shape_yx": (3, 40)}, ShapeError, "at least one lenslet"),
    ({"lenslet_focal_length_um": -1.0}, ConfigError, "lenslet_focal_length_um"),
])
def test_bad_designs_are_refused(kwargs, error, match):
    with pytest.raises(error, match=match):
        LensletDesign(**kwargs)


def test_bad_depths_and_positions_are_refused(small_design):
    with pytest.raises(ConfigError, match="depths_um"):
        lenslet_point_images(small_design, [], [(1, 1)])
    with pytest.raises(ConfigError, match="positions_yx_px"):
        lenslet_point_images(small_design, [0.0], [(np.nan, 1)])


def test_uneven_depths_make_no_model(small_design):
    stack = lenslet_psf_stack(small_design, [0.0, 1.0, 3.0], workers=1)
    with pytest.raises(ConfigError, match="evenly"):
        stack.to_model()


def test_lenslet_demo_end_to_end(tmp_path, capsys):
    import re

    import zarr

    from volrecon.cli import main

    out = tmp_path / "demo"
    argv = ["demo", str(out), "--optics", "lenslet", "--frames", "4", "--no-progress"]
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert "4 frames reconstructed" in text and "calibration report" in text
    assert "distinguishable depths" in (out / "psf-model.report" / "summary.txt").read_text()
    correlation = float(re.search(r"correlation with the truth .*: ([0-9.]+)", text).group(1))
    # Known synthetic truth: the simulated beads and fibre. The 8-frame run reaches 0.91;
    # the adjoint of the same model about 0.45.
    assert correlation > 0.8
    model = volrecon.PSFModel.load(out / "psf-model")
    assert isinstance(model, LensletPSF) and model.lenslet_pitch == 5
    store = zarr.open_group(out / "volumes.zarr", mode="r")
    assert store["0"].shape == (4, 8, 60, 60)
    assert 'method = "rl"' in (out / "job.toml").read_text()
    # The same directory with the other optics is refused in one line.
    assert main(["demo", str(out), "--frames", "4", "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "made with --optics lenslet" in err and len(err.strip().splitlines()) == 1


def test_four_frame_job_matches_plain_fista_per_frame(rng, tmp_path, small_stack):
    import tomli_w
    import zarr

    from volrecon.cli import main

    model = small_stack.to_model()
    model.save(tmp_path / "model")
    # Four frames of eight beads drifting one voxel per frame across x, with shot noise.
    start = np.stack([rng.integers(0, 5, 8), rng.integers(8, 28, 8), rng.integers(8, 24, 8)])
    brightness = 1e5 * (0.5 + rng.random(8))
    truths = np.zeros((4, *model.shape_in), np.float32)
    for t in range(4):
        np.add.at(truths[t], (start[0], start[1], start[2] + t), brightness)
    frames = np.stack([rng.poisson(np.asarray(model.forward(v)) + 2.0) - 2.0
                       for v in truths]).astype(np.float32)
    tifffile.imwrite(tmp_path / "raw.tif", frames, photometric="minisblack")
    solver = {"method": "fista", "iterations": 60}
    (tmp_path / "job.toml").write_text(tomli_w.dumps({
        "model": {"path": "model"}, "video": {"path": "raw.tif"}, "solver": solver,
        "output": {"path": "out.zarr", "time_interval_s": 0.1},
        "compute": {"frames_per_task": 4}}))
    assert main(["run", str(tmp_path / "job.toml"), "--no-progress"]) == 0
    volumes = zarr.open_group(tmp_path / "out.zarr", mode="r")["0"][:]
    assert volumes.shape == truths.shape
    job = np.mean([blurred_correlation(v, t) for v, t in zip(volumes, truths, strict=True)])
    plain = np.mean([blurred_correlation(volrecon.reconstruct(f, model, **solver), t)
                     for f, t in zip(frames, truths, strict=True)])
    # Known truth: the beads; reference: plain FISTA per frame at the same iterations (the
    # issue's target: the job reaches at least 0.9 of it). Measured: job 0.935, plain 0.940;
    # plain above 0.7 shows the reference itself resolves the beads.
    assert job >= 0.9 * plain, (job, plain)
    assert plain > 0.7, plain


def test_tune_on_a_lenslet_job(rng, tmp_path, small_stack, capsys):
    import json
    import tomllib

    import tomli_w
    import zarr

    from volrecon.cli import main

    model = small_stack.to_model()
    model.save(tmp_path / "model")
    # Six frames of the same six beads with shot noise on a flat background of 5 photons,
    # recorded in photon counts (gain 1 count per electron).
    truth = np.zeros(model.shape_in, np.float32)
    np.add.at(truth, (rng.integers(0, 5, 6), rng.integers(8, 28, 6), rng.integers(8, 28, 6)),
              1e4)
    photons = np.asarray(model.forward(truth)) + 5.0
    frames = rng.poisson(photons, size=(6, *photons.shape)).astype(np.float32)
    tifffile.imwrite(tmp_path / "raw.tif", frames, photometric="minisblack")
    job = {"model": {"path": "model"}, "video": {"path": "raw.tif"},
           "solver": {"method": "fista", "iterations": 20},
           "output": {"path": "out.zarr", "time_interval_s": 0.1}}
    (tmp_path / "job.toml").write_text(tomli_w.dumps(job))
    argv = ["tune", str(tmp_path / "job.toml"), "--sites", "2", "--sweep-iterations", "10",
            "--max-iterations", "40", "--reference-iterations", "60", "--gain", "1", "--quiet"]
    assert main(argv) == 0
    tuned = tomllib.loads((tmp_path / "job.tuned.toml").read_text())
    assert tuned["solver"]["method"] == "fista"
    assert tuned["solver"]["iterations"] in (10, 20, 40)
    report = json.loads((tmp_path / "job.tuned.report" / "tune.json").read_text())
    assert report["method"] == "fista" and report["chosen"]["iterations"] == \
        tuned["solver"]["iterations"]
    # The tuned job runs and, against the known synthetic truth (the beads), does at least
    # as well as the untuned settings (plain FISTA per frame at the job's 20 iterations).
    assert main(["run", str(tmp_path / "job.tuned.toml"), "--no-progress"]) == 0
    volumes = zarr.open_group(tmp_path / "out.zarr", mode="r")["0"][:]
    score = np.mean([blurred_correlation(v, truth) for v in volumes])
    untuned = np.mean([blurred_correlation(
        volrecon.reconstruct(f, model, method="fista", iterations=20), truth) for f in frames])
    assert score >= untuned and score > 0.7, (score, untuned)
    capsys.readouterr()
    # An ADMM job on the same model is refused in one line naming the usable methods.
    job["solver"]["method"] = "admm"
    (tmp_path / "admm.toml").write_text(tomli_w.dumps(job))
    assert main(["tune", str(tmp_path / "admm.toml"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and '"fista" or "rl"' in err
