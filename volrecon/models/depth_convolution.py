"""Shift-invariant, depth-resolved PSF model: one 2-D PSF per depth plane."""

from __future__ import annotations

from itertools import pairwise
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.backend import Backend, get_backend
from volrecon.errors import DataError, ShapeError
from volrecon.models.base import Geometry, PSFModel

if TYPE_CHECKING:
    from volrecon._typing import Array

__all__ = ["CHUNK_BYTES", "DepthConvolutionPSF", "correlation_window", "plane_chunks",
           "psf_spectra"]


def psf_spectra(psf_zyx: Array, padded_shape: tuple[int, int], backend: Backend) -> Array:
    """Spectra of PSF planes placed for the centre convention on the padded grid.

    Each plane is zero-padded to `padded_shape` and rolled by ``(-(Y//2), -(X//2))`` so that a
    volume stored at ``[0:Y, 0:X]`` of the padded grid, circularly convolved, lands on the
    sensor at ``[0:Y, 0:X]``. Because the padded size is at least ``2N - 1`` this circular
    convolution equals the linear one on that window.
    """
    xp = backend.xp
    ny, nx = psf_zyx.shape[-2:]
    padded = xp.zeros((*psf_zyx.shape[:-2], *padded_shape), dtype=psf_zyx.dtype)
    padded[..., :ny, :nx] = psf_zyx
    padded = xp.roll(padded, (-(ny // 2), -(nx // 2)), axis=(-2, -1))
    return backend.rfft2(padded, padded_shape)


def correlation_window(products: Array, padded_shape: tuple[int, int],
                       window_yx: tuple[int, int], backend: Backend, *,
                       out: Array | None = None) -> Array:
    """``irfft2(conj(P))[..., :Y, :X]`` from products ``P = Ĥ·conj(B̂)``: a correlation with
    h, windowed, without a conjugated copy of the spectra and without reversing rows.

    For real results ``ifft(conj(P)) = conj(fft(P))/n`` along y, and along x the inverse real
    transform of conjugated coefficients is the index-reversed one, so the y-transform runs
    forward (scaled by ``1/Py``) and only the columns of the x-window are reversed, in the copy
    into `out` that cropping makes anyway. `products` is used as scratch space (overwritten).
    The inverse along x runs only on the Y rows kept.
    """
    px = padded_shape[1]
    ny, nx = window_yx
    kw = {"workers": backend.threads} if backend.device == "cpu" else {}
    columns = backend.fft.fft(products, axis=-2, norm="forward", overwrite_x=True, **kw)
    # A view of rows [0, Y): the inverse along x may use it as scratch (columns is ours).
    full = backend.fft.irfft(columns[..., :ny, :], n=px, axis=-1, overwrite_x=True, **kw)
    if out is None:
        out = backend.xp.empty((*full.shape[:-1], nx), dtype=full.dtype)
    out[..., 0] = full[..., 0]
    out[..., 1:] = full[..., : px - nx : -1]
    return out


#: Spectrum bytes per block of planes that forward / adjoint transform at once on the CPU.
#: Measured on 2 cores (32 MiB L3), per application against one unblocked FFT bound: at
#: 32×512² (4 MiB per plane) blocks of 1 plane cost 0.12 (forward) and 0.15 (adjoint),
#: blocks of 3 planes 0.2–0.3 and all 32 at once 0.5; at 16×128² (0.26 MiB per plane) one
#: block of 16 planes is best (0.48, 0.45) and blocks of 1 plane cost 0.68, 0.65 (per-call
#: overhead). Blocks that stay in the cache win while the per-call cost is small.
CHUNK_BYTES = 6 << 20


def plane_chunks(n_planes: int, plane_bytes: int, backend: Backend
                 ) -> tuple[tuple[int, int], ...]:
    """``[z0, z1)`` blocks of about `CHUNK_BYTES` of spectra each, of equal size to within
    one plane (one block on the GPU)."""
    per_block = n_planes
    if backend.device == "cpu":
        per_block = max(1, CHUNK_BYTES // max(plane_bytes, 1))
    blocks = -(-n_planes // per_block)
    bounds = [n_planes * k // blocks for k in range(blocks + 1)]
    return tuple(pairwise(bounds))


class DepthConvolutionPSF(PSFModel):
    """Volume → frame by one 2-D linear convolution per depth plane, summed over depth.

    ``forward(v) = Σ_z h_z ⊛ v_z``, cropped to the sensor with the centre convention: a unit
    point at voxel ``(z, Y//2, X//2)`` gives exactly ``h_z``; at ``(z, Y//2+dy, X//2+dx)`` it
    gives ``h_z`` shifted by ``(dy, dx)``.

    Parameters
    ----------
    psf_zyx : ndarray of shape (Z, Y, X)
        PSF plane per depth, on the sensor grid, used exactly as given (no normalisation).
    geometry : Geometry
        Physical sampling of the planes.
    dtype : {float32, float64}
        Working precision; spectra are complex64 or complex128.
    backend : Backend, optional
        Device and FFT threads. Default: CPU, all cores.
    calibration : dict, optional
        JSON-serialisable facts about how the model was made (the measured relative
        throughput per depth, figures of merit), saved with the model as
        :attr:`calibration`. It does not change the operator.

    Notes
    -----
    Linear convolution is computed as circular convolution on a zero-padded grid of
    ``next_fast_len(2N - 1)`` per axis with real FFTs. One ``forward`` costs Z forward and one
    inverse real 2-D FFT; ``adjoint`` one forward and Z inverse. The volume fills only Y of
    the Py rows, so the forward transforms along x skip the zero rows, and the adjoint's
    inverse along x runs only on the Y rows it keeps (:meth:`volrecon.backend.Backend.rfft2`,
    :func:`correlation_window`). On the CPU the planes go through in
    blocks of about `CHUNK_BYTES` of spectra, so that no temporary has Z planes and each
    block's transforms run in the cache.
    """

    kind = "depth-convolution"

    def __init__(self, psf_zyx: Any, geometry: Geometry, *, dtype: Any = np.float32,
                 backend: Backend | None = None,
                 calibration: dict[str, Any] | None = None) -> None:
        backend = backend or get_backend("cpu")
        host = np.asarray(backend.to_numpy(psf_zyx) if not isinstance(psf_zyx, np.ndarray)
                          else psf_zyx)
        if host.ndim != 3:
            raise ShapeError(f"psf_zyx must have 3 axes (Z, Y, X); got shape {host.shape}")
        if min(host.shape) < 1:
            raise ShapeError(f"psf_zyx must not be empty; got shape {host.shape}")
        if not np.isfinite(host).all():
            raise DataError("psf_zyx contains NaN or Inf; clean the PSF stack first")
        super().__init__(host.shape, dtype, geometry, backend)
        self.psf_zyx = np.array(host, dtype=self.dtype)  # private copy: inputs are never modified
        self.psf_zyx.setflags(write=False)
        self.calibration: dict[str, Any] = dict(calibration or {})
        self._spectra = psf_spectra(backend.asarray(self.psf_zyx), self.padded_shape, backend)
        self._chunks = plane_chunks(self.n_planes, self._spectra[0].nbytes, backend)

    def transfer_functions(self) -> Array:
        return self._spectra

    def _forward(self, volumes: Array) -> Array:
        be = self.backend
        shape = self.padded_shape
        total = be.xp.zeros((volumes.shape[0], *self._spectra.shape[1:]),
                            dtype=self._spectra.dtype)
        for z0, z1 in self._chunks:
            spectra = be.rfft2(volumes[:, z0:z1], shape)
            spectra *= self._spectra[z0:z1]
            total += spectra.sum(axis=-3)
        return be.irfft2_window(total, shape, self.shape_out, overwrite=True)

    def _adjoint(self, images: Array) -> Array:
        # Correlation with h, irfft2(conj(Ĥ)·B̂), from the products Ĥ·conj(B̂).
        be = self.backend
        spectrum = be.rfft2(images, self.padded_shape)
        be.xp.conjugate(spectrum, out=spectrum)
        out = be.xp.empty((images.shape[0], *self.shape_in), dtype=self.dtype)
        for z0, z1 in self._chunks:
            correlation_window(spectrum[:, None] * self._spectra[z0:z1], self.padded_shape,
                               self.shape_out, be, out=out[:, z0:z1])
        return out

    def store_arrays(self) -> dict[str, np.ndarray]:
        return {"psf": self.psf_zyx}

    def store_attributes(self) -> dict[str, Any]:
        return {"calibration": self.calibration} if self.calibration else {}

    @classmethod
    def from_store(cls, arrays: dict[str, np.ndarray], attributes: dict[str, Any],
                   geometry: Geometry, dtype: Any) -> DepthConvolutionPSF:
        return cls(arrays["psf"], geometry, dtype=dtype,
                   calibration=attributes.get("calibration"))

    def with_backend(self, backend: Backend) -> DepthConvolutionPSF:
        model = DepthConvolutionPSF(self.psf_zyx, self.geometry, dtype=self.dtype, backend=backend,
                                    calibration=self.calibration)
        model._norm_cache.update(self._norm_cache)
        return model

    def __reduce__(self) -> tuple[Any, ...]:
        # Pickle the PSF, not the spectra: half the bytes, and the receiver rebuilds them.
        return (_rebuild, (self.psf_zyx, self.geometry, self.dtype.str,
                           self._norm_cache.get("value"), self.calibration))


def _rebuild(psf: np.ndarray, geometry: Geometry, dtype: str, norm: float | None,
             calibration: dict[str, Any] | None = None) -> DepthConvolutionPSF:
    model = DepthConvolutionPSF(psf, geometry, dtype=dtype, calibration=calibration)
    model._seed_norm(norm)
    return model
