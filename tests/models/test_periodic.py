"""LensletPSF against scipy's linear convolution per sub-position, adjointness, storage."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from operator_family import OperatorChecks
from scipy.ndimage import gaussian_filter
from scipy.signal import fftconvolve

import volrecon
from volrecon.errors import ConfigError, DataError, ModelStoreError, ShapeError
from volrecon.models import DepthConvolutionPSF, Geometry, LensletPSF, PSFModel
from volrecon.models.testing import dot_test

GEOMETRY = Geometry(2.0, 0.5, -1.0)


def _reference_forward(volume, psf):
    """Direct sum over sub-positions of scipy.signal.fftconvolve (mode "full").

    The voxels of sub-position (i, j) are those at (y0 + i + kN, x0 + j + lN); a point at
    (y0 + i, x0 + j) reproduces psf[z, i, j], so the full convolution of those voxels with
    psf[z, i, j] is cropped at (y0 + i, x0 + j).
    """
    nz, n, _, ny, nx = psf.shape
    y0, x0 = n * ((ny // 2) // n), n * ((nx // 2) // n)
    out = np.zeros((ny, nx))
    for z in range(nz):
        for i in range(n):
            for j in range(n):
                lattice = np.zeros((ny, nx))
                lattice[(y0 + i) % n :: n, (x0 + j) % n :: n] = \
                    volume[z, (y0 + i) % n :: n, (x0 + j) % n :: n]
                full = fftconvolve(lattice, psf[z, i, j])
                out += full[y0 + i : y0 + i + ny, x0 + j : x0 + j + nx]
    return out


@pytest.mark.parametrize("shape", [(1, 1, 9, 8), (1, 2, 8, 9), (3, 3, 17, 20), (2, 4, 13, 11)])
@pytest.mark.parametrize("dtype, rtol", [(np.float64, 1e-10), (np.float32, 1e-4)])
def test_forward_matches_scipy_per_sub_position(rng, shape, dtype, rtol):
    nz, n, ny, nx = shape
    psf = rng.random((nz, n, n, ny, nx))
    volume = rng.random((nz, ny, nx))
    model = PSFModel.from_stack(psf, 2.0, 0.5, lenslet_pitch=n, dtype=dtype)
    assert isinstance(model, LensletPSF) and model.shape_in == (nz, ny, nx)
    got = model.forward(volume.astype(dtype))
    assert got.dtype == dtype
    # Reference: scipy.signal.fftconvolve per sub-position (above). float64 agrees to
    # rounding; float32 to its precision times the FFT depth, as for the other kinds.
    expected = _reference_forward(volume, psf)
    assert np.linalg.norm(got - expected) / np.linalg.norm(expected) < rtol


def _compact_responses(rng, shape_znyx, reach_yx):
    """Random responses lit only from lenslet ya to yb (xa to xb) around the central block."""
    nz, n, ny, nx = shape_znyx
    y0, x0 = n * ((ny // 2) // n), n * ((nx // 2) // n)
    (ya, yb), (xa, xb) = reach_yx
    psf = np.zeros((nz, n, n, ny, nx))
    window = (slice(y0 + n * ya, y0 + n * (yb + 1)), slice(x0 + n * xa, x0 + n * (xb + 1)))
    psf[..., window[0], window[1]] = rng.random(psf[..., window[0], window[1]].shape)
    return psf


@pytest.mark.parametrize("reach_yx", [((-2, 1), (0, 3)), ((0, 0), (-1, 0)), ((-4, 4), (-4, 4))])
def test_compact_responses_use_a_smaller_lattice_grid_and_stay_exact(rng, reach_yx):
    nz, n, ny, nx = 2, 3, 31, 26
    psf = _compact_responses(rng, (nz, n, ny, nx), reach_yx)
    (ya, yb), (xa, xb) = reach_yx
    volume = rng.random((nz, ny, nx))
    model = LensletPSF(psf, GEOMETRY, dtype=np.float64)
    qy, qx = model.lattice_shape
    # Known truth: a kernel reaching D lenslets from its centre needs Q + D coarse samples.
    assert model.lattice_padded_shape[0] >= qy + max(-ya, yb)
    assert model.lattice_padded_shape[1] >= qx + max(-xa, xb)
    if max(-ya, yb) < 4:
        assert model.lattice_padded_shape[0] < 2 * qy - 1
    # Reference: scipy.signal.fftconvolve per sub-position; float64 agrees to rounding.
    expected = _reference_forward(volume, psf)
    got = model.forward(volume)
    assert np.linalg.norm(got - expected) / np.linalg.norm(expected) < 1e-10
    dot_test(model, rng=rng, rtol=1e-10)



@pytest.mark.parametrize("reach_yx, tiles_yx", [
    (((-2, 2), (-1, 3)), (3, 2)),   # taps on both sides of the centre
    (((1, 3), (-3, -1)), (2, 4)),   # taps only below / only left of the centre
    (((0, 0), (-1, 1)), (8, 1)),    # one tap along y: tiles that do not overlap
])
def test_overlap_save_tiles_match_scipy(rng, reach_yx, tiles_yx):
    nz, n, ny, nx = 2, 3, 47, 50
    psf = _compact_responses(rng, (nz, n, ny, nx), reach_yx)
    volume = rng.random((nz, ny, nx))
    model = LensletPSF(psf, GEOMETRY, dtype=np.float64, tiles_yx=tiles_yx)
    assert model.tiles_yx == tiles_yx
    # The tile grid only has to hold a tile and the taps' span, not the whole lattice.
    assert model.tile_grid_shape[0] < model.lattice_padded_shape[0]
    # Reference: scipy.signal.fftconvolve per sub-position; float64 agrees to rounding.
    expected = _reference_forward(volume, psf)
    got = model.forward(volume)
    assert np.linalg.norm(got - expected) / np.linalg.norm(expected) < 1e-10
    dot_test(model, rng=rng, rtol=1e-10)
    # The tiling survives a change of backend and pickling.
    assert model.on_device("cpu", threads=1).tiles_yx == tiles_yx
    assert pickle.loads(pickle.dumps(model)).tiles_yx == tiles_yx


def test_tiles_follow_the_sensor_size_and_bound_the_spectra(rng):
    # Responses within ±2 lenslets on a 1000² sensor: in one piece the matrices would hold
    # Z·N⁴·G·(G//2+1) complex numbers on G ≥ Q + 2 = 202 (about 40 MB here), tiles keep them
    # on a grid of a few tile lengths.
    nz, n, size = 1, 5, 1000
    psf = np.zeros((nz, n, n, size, size), np.float32)
    y0 = n * ((size // 2) // n)
    psf[..., y0 - 2 * n : y0 + 3 * n, y0 - 2 * n : y0 + 3 * n] = 1.0
    model = LensletPSF(psf, GEOMETRY)
    assert min(model.tiles_yx) > 1
    assert max(model.tile_grid_shape) < model.lattice_padded_shape[0] // 2
    # Known truth: a point at the block origin gives its response unshifted.
    point = np.zeros(model.shape_in, np.float32)
    point[0, y0 + 1, y0 + 2] = 1.0
    np.testing.assert_allclose(model.forward(point), psf[0, 1, 2], atol=1e-5)


def test_tiles_that_do_not_cut_the_axis_are_refused(rng):
    psf = rng.random((1, 2, 2, 8, 8))
    with pytest.raises(ConfigError, match="tiles_yx"):
        LensletPSF(psf, GEOMETRY, tiles_yx=(9, 1))

def test_point_responses_repeat_with_the_pitch(rng):
    psf = rng.random((2, 3, 3, 14, 16)).astype(np.float32)
    model = LensletPSF(psf, GEOMETRY)
    y0, x0 = model.block_origin_yx
    assert (y0, x0) == (6, 6)
    point = np.zeros(model.shape_in, np.float32)
    point[1, y0 + 2, x0 + 1] = 1.0
    # Known truth (the contract): a point at (y0 + i, x0 + j) gives psf[z, i, j] unshifted.
    np.testing.assert_allclose(model.forward(point), psf[1, 2, 1], atol=1e-6)
    moved = np.zeros_like(point)
    moved[1, y0 + 2 - 3, x0 + 1 + 6] = 1.0
    expected = np.zeros_like(psf[1, 2, 1])
    expected[:-3, 6:] = psf[1, 2, 1, 3:, :-6]
    # ... and one pitch up, two to the right: the same response shifted by (-3, +6).
    np.testing.assert_allclose(model.forward(moved), expected, atol=1e-6)


def test_pitch_one_is_the_shift_invariant_model(rng):
    psf = rng.random((3, 1, 1, 10, 11))
    volume = rng.random((3, 10, 11))
    lenslet = LensletPSF(psf, GEOMETRY, dtype=np.float64)
    # Known truth: with one sub-position the model is Σ_z h_z ⊛ v_z with the same centre.
    plain = DepthConvolutionPSF(psf[:, 0, 0], GEOMETRY, dtype=np.float64)
    np.testing.assert_allclose(lenslet.forward(volume), plain.forward(volume), atol=1e-12)
    assert lenslet.transfer_functions() is None


class TestLensletOperator(OperatorChecks):
    def make(self, rng, dtype):
        return LensletPSF(rng.random((2, 2, 2, 8, 9)).astype(dtype), GEOMETRY, dtype=dtype,
                          calibration={"source": "scan.tif"})


class TestLensletOperatorOddPitch(OperatorChecks):
    def make(self, rng, dtype):
        return LensletPSF(rng.random((1, 3, 3, 10, 7)).astype(dtype), GEOMETRY, dtype=dtype)


def test_store_round_trip_keeps_pitch_and_calibration(rng, tmp_path):
    model = LensletPSF(rng.random((2, 3, 3, 9, 9)), GEOMETRY, calibration={"hot_pixels": 2})
    model.operator_norm_squared()
    model.save(tmp_path / "lf.zarr")
    loaded = PSFModel.load(tmp_path / "lf.zarr")
    assert isinstance(loaded, LensletPSF) and loaded.kind == "lenslet"
    assert loaded.lenslet_pitch == 3 and loaded.calibration == {"hot_pixels": 2}
    np.testing.assert_array_equal(loaded.psf, model.psf)
    assert loaded.operator_norm_squared() == model.operator_norm_squared()
    clone = pickle.loads(pickle.dumps(loaded))
    volume = rng.random(model.shape_in).astype(np.float32)
    np.testing.assert_array_equal(clone.forward(volume), loaded.forward(volume))


def test_store_with_a_wrong_pitch_is_refused(rng, tmp_path):
    import json

    LensletPSF(rng.random((1, 2, 2, 8, 8)), GEOMETRY).save(tmp_path / "lf.zarr")
    meta_path = tmp_path / "lf.zarr" / "zarr.json"
    meta = json.loads(meta_path.read_text())
    meta["attributes"]["volrecon_model"]["parameters"]["lenslet_pitch"] = 3
    meta_path.write_text(json.dumps(meta))
    with pytest.raises(ModelStoreError, match="lenslet_pitch"):
        PSFModel.load(tmp_path / "lf.zarr")


@pytest.mark.parametrize("shape, pitch, match", [
    ((2, 3, 3, 8, 8), None, "lenslet_pitch=3"),
    ((2, 8, 8), 2, r"\(Z, 2, 2, Y, X\)"),
    ((2, 3, 3, 8, 8), 2, r"\(Z, 2, 2, Y, X\)"),
])
def test_from_stack_refuses_mismatched_stacks(shape, pitch, match):
    with pytest.raises(ShapeError, match=match):
        PSFModel.from_stack(np.ones(shape), 1.0, 1.0, lenslet_pitch=pitch)


@pytest.mark.parametrize("psf, error, match", [
    (np.ones((2, 2, 3, 8, 8)), ShapeError, "5 non-empty axes"),
    (np.ones((2, 8, 8)), ShapeError, "5 non-empty axes"),
    (np.ones((1, 9, 9, 8, 12)), ShapeError, "does not fit"),
    (np.full((1, 2, 2, 8, 8), np.nan), DataError, "NaN"),
])
def test_bad_stacks_are_refused(psf, error, match):
    with pytest.raises(error, match=match):
        LensletPSF(psf, GEOMETRY)


def _spot_stack(rng, nz=4, n=3, ny=36, nx=36):
    """Each sub-position and depth lights three blurred spots within ±6 px of the point."""
    y0, x0 = n * ((ny // 2) // n), n * ((nx // 2) // n)
    psf = np.zeros((nz, n, n, ny, nx))
    for z in range(nz):
        for i in range(n):
            for j in range(n):
                for dy, dx in rng.integers(-6, 7, (3, 2)):
                    psf[z, i, j, y0 + i + dy, x0 + j + dx] += 0.5 + rng.random()
    return gaussian_filter(psf, sigma=(0, 0, 0, 0.7, 0.7)).astype(np.float32)


def test_fista_recovers_beads_and_admm_is_refused(rng):
    model = PSFModel.from_stack(_spot_stack(rng), 2.0, 0.5, lenslet_pitch=3)
    truth = np.zeros(model.shape_in, np.float32)
    for z, y, x in zip(rng.integers(0, 4, 6), rng.integers(6, 30, 6), rng.integers(6, 30, 6),
                       strict=True):
        truth[z, y, x] = 1.0 + rng.random()
    frame = model.forward(truth)
    volume = volrecon.reconstruct(frame, model, method="fista", iterations=150)
    # Known truth: six beads at known voxels, noise-free frame. 0.95 leaves room for the
    # light FISTA has not yet moved onto the beads after 150 iterations (it reaches ~0.99).
    assert np.corrcoef(volume.ravel(), truth.ravel())[0, 1] > 0.95
    assert volume.min() >= 0
    rl = volrecon.reconstruct(frame, model, method="rl", iterations=20)
    assert rl.shape == model.shape_in and np.isfinite(rl).all()
    with pytest.raises(ConfigError, match="'fista' or 'rl'"):
        volrecon.reconstruct(frame, model, method="admm")


def test_model_store_opens_as_sub_position_responses(rng, tmp_path):
    from volrecon.napari.stores import model_store_layers, store_kind

    model = LensletPSF(rng.random((2, 3, 3, 9, 9)), GEOMETRY)
    model.save(tmp_path / "lf.zarr")
    assert store_kind(tmp_path / "lf.zarr") == "model"
    (data, kwargs, layer_type), = model_store_layers(tmp_path / "lf.zarr")
    # Reference: the stack the model was built from, sub-position axes first for sliders.
    np.testing.assert_array_equal(data.compute(), np.moveaxis(model.psf, 0, 2))
    assert layer_type == "image"
    assert kwargs["axis_labels"] == ["sub-position y", "sub-position x", "z", "y", "x"]
    assert kwargs["scale"] == [1.0, 1.0, 2.0, 0.5, 0.5]
    assert kwargs["translate"] == [0.0, 0.0, -1.0, 0.0, 0.0]


def test_a_job_with_admm_on_a_lenslet_model_is_refused_before_any_write(rng, tmp_path,
                                                                          capsys):
    import tifffile
    import tomli_w

    from volrecon.cli import main

    model = PSFModel.from_stack(_spot_stack(rng), 2.0, 0.5, lenslet_pitch=3)
    model.save(tmp_path / "model")
    frames = np.stack([model.forward(rng.random(model.shape_in).astype(np.float32))] * 2)
    tifffile.imwrite(tmp_path / "raw.tif", frames.astype(np.float32), photometric="minisblack")
    (tmp_path / "job.toml").write_text(tomli_w.dumps({
        "model": {"path": "model"}, "video": {"path": "raw.tif"},
        "solver": {"method": "admm", "iterations": 5},
        "output": {"path": "out.zarr", "time_interval_s": 0.1}}))
    assert main(["run", str(tmp_path / "job.toml"), "--no-progress"]) == 2
    (line,) = capsys.readouterr().err.strip().splitlines()
    assert "solver.method" in line and "lenslet" in line and '"fista"' in line
    assert not (tmp_path / "out.zarr").exists()
