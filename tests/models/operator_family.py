"""Checks every PSF model kind must pass; a kind's test class subclasses OperatorChecks.

A subclass provides ``make(self, rng, dtype)`` returning a small model with random content.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from volrecon.models import PSFModel
from volrecon.models.testing import dot_test


class OperatorChecks:
    """Adjointness, batching, dtype, pickling, save/load and backend copies."""

    def make(self, rng: np.random.Generator, dtype: type) -> PSFModel:  # pragma: no cover
        raise TypeError("subclasses define make()")

    @pytest.mark.parametrize("dtype, rtol", [(np.float32, 1e-5), (np.float64, 1e-10)])
    def test_dot_test(self, rng, dtype, rtol):
        model = self.make(rng, dtype)
        # Reference: the definition of the adjoint, <Ax, y> = <x, Aᵀy>. The bound is a few
        # hundred ulps of the dtype times the FFT depth, as for the shift-invariant model.
        assert dot_test(model, rng=rng, rtol=rtol) < rtol

    def test_batched_equals_single(self, rng):
        model = self.make(rng, np.float64)
        volumes = rng.standard_normal((3, *model.shape_in))
        images = rng.standard_normal((2, 1, *model.shape_out))
        batch_f, batch_a = model.forward(volumes), model.adjoint(images)
        assert batch_f.shape == (3, *model.shape_out)
        assert batch_a.shape == (2, 1, *model.shape_in)
        for k in range(3):
            np.testing.assert_allclose(batch_f[k], model.forward(volumes[k]), rtol=1e-12,
                                       atol=1e-12)
        for k in range(2):
            np.testing.assert_allclose(batch_a[k, 0], model.adjoint(images[k, 0]), rtol=1e-12,
                                       atol=1e-12)

    def test_dtype_and_inputs_untouched(self, rng):
        model = self.make(rng, np.float32)
        volume = rng.standard_normal(model.shape_in)
        before = volume.copy()
        out = model.forward(volume)
        assert out.dtype == np.float32 and out.shape == model.shape_out
        np.testing.assert_array_equal(volume, before)
        assert model.adjoint(out).dtype == np.float32

    def test_pickle_save_load_backend_copy(self, rng, tmp_path):
        model = self.make(rng, np.float32)
        norm = model.operator_norm_squared()
        volume = rng.standard_normal(model.shape_in).astype(np.float32)
        expected = model.forward(volume)
        model.save(tmp_path / "m.zarr")
        for copy in (pickle.loads(pickle.dumps(model)), PSFModel.load(tmp_path / "m.zarr"),
                     model.on_device("cpu", threads=1)):
            assert type(copy) is type(model) and copy.shape_in == model.shape_in
            assert copy.geometry == model.geometry
            # Same arrays, same maths: only FFT thread counts may differ (float32 rounding).
            np.testing.assert_allclose(copy.forward(volume), expected, rtol=1e-5, atol=1e-6)
            assert copy.operator_norm_squared() == pytest.approx(norm, rel=1e-6)

    def test_operator_norm_matches_dense(self, rng):
        model = self.make(rng, np.float64)
        size = int(np.prod(model.shape_in))
        if size > 800:
            pytest.skip("dense matrix too large for this model size")
        dense = np.stack([model.forward(e.reshape(model.shape_in)).ravel()
                          for e in np.eye(size)], axis=1)
        # Reference: numpy.linalg.norm(·, 2)² (largest singular value squared). No slack
        # below: FISTA's step 1/L is only safe when L is at least ‖A‖² (the model raises its
        # power-iteration estimate by 1 % and caps it by the uncropped circulant's norm,
        # which is never below the cropped one); the 1e-9 is float64 rounding of the SVD.
        largest = np.linalg.norm(dense, 2) ** 2
        assert largest * (1 - 1e-9) <= model.operator_norm_squared() <= largest * 1.011
