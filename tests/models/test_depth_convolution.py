"""DepthConvolutionPSF against scipy's linear convolution, adjointness, storage."""

from __future__ import annotations

import pickle
from itertools import pairwise

import numpy as np
import pytest
from operator_family import OperatorChecks
from scipy.signal import fftconvolve

import volrecon
from volrecon.errors import DataError, ModelStoreError, ShapeError
from volrecon.models import DepthConvolutionPSF, Geometry, PSFModel
from volrecon.models.testing import dot_test


def _reference_forward(volume, psf):
    # Reference: scipy.signal.fftconvolve (mode "full"), cropped at (Y//2, X//2) — the
    # centre convention of the issue: a point at (Y//2, X//2) reproduces the PSF plane.
    _, ny, nx = psf.shape
    return sum(fftconvolve(v, h)[ny // 2 : ny // 2 + ny, nx // 2 : nx // 2 + nx]
               for v, h in zip(volume, psf, strict=True))


@pytest.mark.parametrize("shape_zyx", [(1, 16, 16), (3, 17, 24), (4, 9, 8)])
@pytest.mark.parametrize("dtype, rtol", [(np.float64, 1e-5), (np.float32, 1e-4)])
def test_forward_matches_scipy(rng, shape_zyx, dtype, rtol):
    psf, volume = rng.random((2, *shape_zyx))
    model = PSFModel.from_stack(psf, 2.0, 0.5, dtype=dtype)
    expected = _reference_forward(volume, psf)
    got = model.forward(volume.astype(dtype))
    assert got.dtype == dtype
    # Tolerances from the issue: relative error < 1e-5 in float64, < 1e-4 in float32.
    assert np.linalg.norm(got - expected) / np.linalg.norm(expected) < rtol


@pytest.mark.parametrize("shape_zyx", [(1, 16, 16), (3, 17, 24)])
def test_adjoint_dot_test(rng, shape_zyx):
    model = PSFModel.from_stack(rng.random(shape_zyx), 1.0, 1.0)
    # Reference: the definition of the adjoint, <Ax, y> = <x, Aᵀy>; 1e-5 is the bound.
    assert dot_test(model, rng=rng, rtol=1e-5) < 1e-5


def test_centre_convention(rng):
    psf = rng.random((3, 12, 15)).astype(np.float32)
    model = PSFModel.from_stack(psf, 1.0, 1.0)
    point = np.zeros((3, 12, 15), np.float32)
    point[1, 6, 7] = 1.0
    # Known truth: a unit point at (i, Y//2, X//2) gives exactly PSF plane i.
    np.testing.assert_allclose(model.forward(point), psf[1], atol=1e-6)
    shifted = np.zeros_like(point)
    shifted[2, 6 + 2, 7 - 3] = 1.0
    expected = np.zeros_like(psf[2])
    expected[2:, :-3] = psf[2, :-2, 3:]
    # Known truth: a point displaced by (dy, dx) gives the plane shifted by (dy, dx).
    np.testing.assert_allclose(model.forward(shifted), expected, atol=1e-6)


def test_batched_forms_equal_single(rng):
    model = PSFModel.from_stack(rng.random((2, 10, 11)), 1.0, 1.0)
    volumes = rng.random((3, 2, 10, 11)).astype(np.float32)
    images = rng.random((3, 10, 11)).astype(np.float32)
    batch_f = model.forward(volumes)
    batch_a = model.adjoint(images)
    for k in range(3):
        np.testing.assert_allclose(batch_f[k], model.forward(volumes[k]), rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(batch_a[k], model.adjoint(images[k]), rtol=1e-5, atol=1e-6)


def test_inputs_not_modified_and_as_given(rng):
    psf = rng.random((2, 8, 8)) * 7.0
    before = psf.copy()
    model = PSFModel.from_stack(psf, 1.0, 1.0)
    np.testing.assert_array_equal(psf, before)
    np.testing.assert_allclose(model.psf_zyx, before.astype(np.float32))  # no normalisation


class TestDepthConvolutionOperator(OperatorChecks):
    def make(self, rng, dtype):
        return DepthConvolutionPSF(rng.random((4, 9, 8)).astype(dtype), Geometry(2.0, 0.5),
                                   dtype=dtype)


def test_operator_norm_matches_dense_svd(rng):
    model = PSFModel.from_stack(rng.random((2, 6, 7)), 1.0, 1.0, dtype=np.float64)
    dense = np.stack([model.forward(e.reshape(model.shape_in)).ravel()
                      for e in np.eye(np.prod(model.shape_in))], axis=1)
    # Reference: numpy.linalg.norm(ord=2) of the dense matrix; the estimate is raised by 1 %.
    largest = np.linalg.norm(dense, 2) ** 2
    assert largest <= model.operator_norm_squared() <= 1.02 * largest


def test_save_load_round_trip(rng, tmp_path):
    psf = rng.random((3, 9, 10))
    model = PSFModel.from_stack(psf, 2.5, 0.65, depth_start_um=-3.0)
    model.operator_norm_squared()
    model.save(tmp_path / "m")
    loaded = PSFModel.load(tmp_path / "m")
    assert isinstance(loaded, DepthConvolutionPSF)
    assert loaded.geometry == model.geometry
    np.testing.assert_array_equal(loaded.psf_zyx, model.psf_zyx)
    np.testing.assert_allclose(loaded.depths_um, [-3.0, -0.5, 2.0])
    assert loaded.operator_norm_squared() == model.operator_norm_squared()


def test_pickle_round_trip(rng):
    model = PSFModel.from_stack(rng.random((2, 8, 9)), 1.0, 1.0)
    clone = pickle.loads(pickle.dumps(model))
    volume = rng.random((2, 8, 9)).astype(np.float32)
    np.testing.assert_array_equal(clone.forward(volume), model.forward(volume))


def test_load_errors(tmp_path):
    with pytest.raises(ModelStoreError, match="no such model store"):
        PSFModel.load(tmp_path / "missing")
    (tmp_path / "plain").mkdir()
    with pytest.raises(ModelStoreError, match="not a zarr v3 store"):
        PSFModel.load(tmp_path / "plain")
    import zarr

    zarr.open_group(tmp_path / "other.zarr", mode="w", zarr_format=3)
    with pytest.raises(ModelStoreError, match="not a volrecon"):
        PSFModel.load(tmp_path / "other.zarr")


def test_load_newer_format_version(rng, tmp_path):
    import json

    PSFModel.from_stack(rng.random((1, 4, 4)), 1.0, 1.0).save(tmp_path / "m")
    meta_path = tmp_path / "m" / "zarr.json"
    meta = json.loads(meta_path.read_text())
    meta["attributes"]["volrecon_model"]["format_version"] = 99
    meta_path.write_text(json.dumps(meta))
    with pytest.raises(ModelStoreError, match="format_version 99"):
        PSFModel.load(tmp_path / "m")


def test_save_refuses_foreign_directory(rng, tmp_path):
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "keep.txt").write_text("x")
    with pytest.raises(ModelStoreError, match="not a volrecon model store"):
        PSFModel.from_stack(rng.random((1, 4, 4)), 1.0, 1.0).save(tmp_path / "data")
    assert (tmp_path / "data" / "keep.txt").read_text() == "x"


def test_construction_errors(rng):
    with pytest.raises(ShapeError, match="3 axes"):
        PSFModel.from_stack(rng.random((4, 4)), 1.0, 1.0)
    bad = rng.random((2, 4, 4))
    bad[1, 2, 2] = np.nan
    with pytest.raises(DataError, match="NaN"):
        PSFModel.from_stack(bad, 1.0, 1.0)
    with pytest.raises(volrecon.errors.ConfigError, match="depth_step_um"):
        PSFModel.from_stack(rng.random((2, 4, 4)), 0.0, 1.0)
    model = PSFModel.from_stack(rng.random((2, 4, 4)), 1.0, 1.0)
    with pytest.raises(ShapeError, match="volume_zyx"):
        model.forward(np.zeros((2, 4, 5)))
    with pytest.raises(ShapeError, match="image_yx"):
        model.adjoint(np.zeros((5, 4)))


@pytest.mark.parametrize(("planes_per_block", "n_blocks"), [(1, 7), (3, 3), (7, 1)])
def test_blocks_of_planes_match_scipy(rng, monkeypatch, planes_per_block, n_blocks):
    import volrecon.models.depth_convolution as dc

    psf, volume = rng.random((2, 7, 11, 13))
    py, px = PSFModel.from_stack(psf, 2.0, 0.5).padded_shape
    monkeypatch.setattr(dc, "CHUNK_BYTES", planes_per_block * py * (px // 2 + 1) * 16)
    model = PSFModel.from_stack(psf, 2.0, 0.5, dtype=np.float64)
    # Known truth: 7 planes in blocks of at most k planes, as equal as possible.
    assert len(model._chunks) == n_blocks
    # Reference: scipy.signal.fftconvolve (float64, so agreement to rounding), and the
    # definition of the adjoint for the blocked adjoint.
    expected = _reference_forward(volume, psf)
    np.testing.assert_allclose(model.forward(volume), expected, rtol=1e-10, atol=1e-12)
    assert dot_test(model, rng=rng, rtol=1e-10) < 1e-10


def test_plane_chunks_cover_the_stack():
    from volrecon.backend import get_backend
    from volrecon.models.depth_convolution import plane_chunks

    cpu = get_backend("cpu", threads=1)
    # Known truth: contiguous, covering, sizes differing by at most one plane.
    for n_planes, plane_bytes, per_block in [(16, 1 << 18, 16), (32, 1 << 22, 1), (7, 3, 7),
                                             (10, 2 << 20, 3)]:
        blocks = plane_chunks(n_planes, plane_bytes, cpu)
        sizes = [hi - lo for lo, hi in blocks]
        assert blocks[0][0] == 0 and blocks[-1][1] == n_planes
        assert all(a[1] == b[0] for a, b in pairwise(blocks))
        assert max(sizes) <= per_block and max(sizes) - min(sizes) <= 1
