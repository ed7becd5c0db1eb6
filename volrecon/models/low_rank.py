"""Depth low-rank PSF model: r lateral kernels shared by all depths, mixed by Z × r weights."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.backend import Backend, get_backend
from volrecon.errors import DataError, ShapeError
from volrecon.models.base import Geometry, PSFModel
from volrecon.models.depth_convolution import correlation_window, psf_spectra

if TYPE_CHECKING:
    from volrecon._typing import Array

__all__ = ["LowRankDepthPSF"]


def _host(a: Any, backend: Backend) -> np.ndarray:
    return np.asarray(a if isinstance(a, np.ndarray) else backend.to_numpy(a))


class LowRankDepthPSF(PSFModel):
    """Shift-invariant model whose PSF stack is a sum of r separable depth × lateral terms.

    The PSF of plane ``z`` is ``h_z = Σ_r weights_zr[z, r] · kernels_ryx[r]``, so

    ``forward(v) = Σ_z h_z ⊛ v_z = Σ_r g_r ⊛ (Σ_z U[z, r] v_z)``

    is computed by mixing the volume's planes with the weights first (a cheap real-space
    contraction) and then convolving only r planes: the Z planes ``h_z`` are never formed.
    Same centre convention as :class:`~volrecon.models.DepthConvolutionPSF`: a unit point at
    voxel ``(z, Y//2, X//2)`` gives exactly ``h_z``.

    Parameters
    ----------
    kernels_ryx : ndarray of shape (r, Y, X)
        Lateral kernels ``g_r`` on the sensor grid (e.g. right singular vectors of the PSF
        stack). Used as given.
    weights_zr : ndarray of shape (Z, r)
        Depth weights ``U[z, r]`` (e.g. left singular vectors times singular values).
    geometry : Geometry
        Physical sampling of the volume planes.
    dtype : {float32, float64}
        Working precision; kernel spectra are complex64 or complex128.
    backend : Backend, optional
        Device and FFT threads. Default: CPU, all cores.
    calibration : dict, optional
        JSON-serialisable facts about how the model was made (throughput per depth, singular
        values, registration shifts); saved with the model and available as
        :attr:`calibration`. It does not change the operator.

    Raises
    ------
    ShapeError
        If the arrays do not have the shapes above or their ranks differ.
    DataError
        If an array holds NaN or Inf.

    Notes
    -----
    Cost of one ``forward``: r forward real 2-D FFTs and one inverse, plus a Z × r mixing of
    real planes; ``adjoint``: one forward FFT, r inverse FFTs and an r × Z mixing. Memory for
    the precomputed spectra is r planes of the padded grid, independent of Z. With weights and
    kernels from a truncated SVD of the (Z × pixels) stack matrix, the model is the best
    rank-r approximation of the stack in the Frobenius norm [1]_.

    References
    ----------
    .. [1] C. Eckart, G. Young, "The approximation of one matrix by another of lower rank",
       Psychometrika 1 (1936) 211-218.

    Examples
    --------
    >>> import numpy as np
    >>> from volrecon.models import Geometry, LowRankDepthPSF
    >>> kernels = np.zeros((1, 8, 8), np.float32); kernels[0, 4, 4] = 1.0
    >>> model = LowRankDepthPSF(kernels, np.ones((3, 1), np.float32), Geometry(2.0, 0.5))
    >>> model.shape_in, model.rank
    ((3, 8, 8), 1)
    """

    kind = "depth-low-rank"

    def __init__(self, kernels_ryx: Any, weights_zr: Any, geometry: Geometry, *,
                 dtype: Any = np.float32, backend: Backend | None = None,
                 calibration: dict[str, Any] | None = None) -> None:
        backend = backend or get_backend("cpu")
        kernels = _host(kernels_ryx, backend)
        weights = _host(weights_zr, backend)
        if kernels.ndim != 3 or min(kernels.shape) < 1:
            raise ShapeError(f"kernels_ryx must have 3 non-empty axes (r, Y, X); got shape "
                             f"{kernels.shape}")
        if weights.ndim != 2 or weights.shape[1] != kernels.shape[0] or weights.shape[0] < 1:
            raise ShapeError(f"weights_zr must have shape (Z, r) with r = {kernels.shape[0]} "
                             f"kernels; got shape {weights.shape}")
        if not (np.isfinite(kernels).all() and np.isfinite(weights).all()):
            raise DataError("kernels_ryx or weights_zr contains NaN or Inf; clean the PSF "
                            "stack before compressing it")
        super().__init__((weights.shape[0], *kernels.shape[1:]), dtype, geometry, backend)
        self.kernels_ryx = np.array(kernels, dtype=self.dtype)  # private copies
        self.weights_zr = np.array(weights, dtype=self.dtype)
        self.kernels_ryx.setflags(write=False)
        self.weights_zr.setflags(write=False)
        self.calibration: dict[str, Any] = dict(calibration or {})
        self._weights = backend.asarray(self.weights_zr)
        self._spectra = psf_spectra(backend.asarray(self.kernels_ryx), self.padded_shape,
                                    backend)

    @property
    def rank(self) -> int:
        """Number of kernels r."""
        return int(self.kernels_ryx.shape[0])

    def expanded_stack(self) -> np.ndarray:
        """The PSF stack ``h_z = Σ_r U[z, r] g_r`` this model applies, shape (Z, Y, X).

        Allocates Z planes; meant for inspection and tests, not for the solvers.
        """
        return np.asarray(np.einsum("zr,ryx->zyx", self.weights_zr, self.kernels_ryx))

    def transfer_functions(self) -> Array:
        """Expanded per-plane spectra ``Ĥ_z = Σ_r U[z, r] Ĝ_r``, shape (Z, Py, Px//2+1).

        Built on each call (Z padded planes) so that the model itself keeps only r of them;
        callers that need it repeatedly (ADMM's exact volume update) keep the result.
        """
        r, py, px = self._spectra.shape
        weights = self._weights.astype(self._spectra.dtype)
        return (weights @ self._spectra.reshape(r, py * px)).reshape(self.n_planes, py, px)

    def _forward(self, volumes: Array) -> Array:
        shape = self.padded_shape
        b, z, ny, nx = volumes.shape
        mixed = (self._weights.T @ volumes.reshape(b, z, ny * nx)).reshape(b, self.rank, ny, nx)
        spectra = self.backend.rfft2(mixed, shape)
        spectra *= self._spectra
        return self.backend.irfft2_window(spectra.sum(axis=-3), shape, self.shape_out,
                                          overwrite=True)

    def _adjoint(self, images: Array) -> Array:
        be = self.backend
        shape = self.padded_shape
        ny, nx = self.shape_out
        # Correlation with each kernel from the products Ĝ_r·conj(B̂), as in
        # DepthConvolutionPSF (no conjugated copy of the spectra).
        spectrum = be.rfft2(images, shape)
        be.xp.conjugate(spectrum, out=spectrum)
        planes = correlation_window(spectrum[:, None] * self._spectra, shape, self.shape_out, be)
        return (self._weights @ planes.reshape(-1, self.rank, ny * nx)).reshape(
            -1, self.n_planes, ny, nx)

    def store_arrays(self) -> dict[str, np.ndarray]:
        return {"kernels": self.kernels_ryx, "weights": self.weights_zr}

    def store_attributes(self) -> dict[str, Any]:
        return {"rank": self.rank, "calibration": self.calibration}

    @classmethod
    def from_store(cls, arrays: dict[str, np.ndarray], attributes: dict[str, Any],
                   geometry: Geometry, dtype: Any) -> LowRankDepthPSF:
        return cls(arrays["kernels"], arrays["weights"], geometry, dtype=dtype,
                   calibration=attributes.get("calibration"))

    def with_backend(self, backend: Backend) -> LowRankDepthPSF:
        model = LowRankDepthPSF(self.kernels_ryx, self.weights_zr, self.geometry,
                                dtype=self.dtype, backend=backend, calibration=self.calibration)
        model._norm_cache.update(self._norm_cache)
        return model

    def __reduce__(self) -> tuple[Any, ...]:
        # Pickle kernels and weights, not spectra: the receiver rebuilds them.
        return (_rebuild, (self.kernels_ryx, self.weights_zr, self.geometry, self.dtype.str,
                           self.calibration, self._norm_cache.get("value")))


def _rebuild(kernels: np.ndarray, weights: np.ndarray, geometry: Geometry, dtype: str,
             calibration: dict[str, Any], norm: float | None) -> LowRankDepthPSF:
    model = LowRankDepthPSF(kernels, weights, geometry, dtype=dtype, calibration=calibration)
    model._seed_norm(norm)
    return model
