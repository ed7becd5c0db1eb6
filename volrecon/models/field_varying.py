"""Field-varying PSF model: PSFs measured at K field positions, blended across the field."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.backend import Backend, get_backend
from volrecon.errors import DataError, ShapeError
from volrecon.models.base import Geometry, PSFModel
from volrecon.models.depth_convolution import psf_spectra

if TYPE_CHECKING:
    from volrecon._typing import Array

__all__ = ["FieldVaryingPSF", "interpolation_weights"]


def interpolation_weights(positions_yx: Any, shape_yx: tuple[int, int]) -> np.ndarray:
    """Piecewise-linear blending weights of K field positions over a (Y, X) grid.

    Weight ``k`` is 1 at position ``k``, 0 at the other positions, and the K weights are
    non-negative and sum to 1 at every pixel (a partition of unity), so the blended PSF equals
    the measured one at each measured position and moves linearly between neighbours.

    Parameters
    ----------
    positions_yx : array_like of shape (K, 2)
        Field positions ``(y, x)`` in sensor pixels; distinct.
    shape_yx : tuple of int
        Grid ``(Y, X)``.

    Returns
    -------
    ndarray of shape (K, Y, X), float64

    Raises
    ------
    ShapeError
        If `positions_yx` is not (K, 2) with K >= 1.
    DataError
        If positions are not finite or two of them coincide.

    Notes
    -----
    K = 1: all ones. Positions on one line: linear interpolation along that line, held
    constant beyond the end points. Otherwise: barycentric coordinates on the Delaunay
    triangulation of the positions; a pixel outside their convex hull takes the coordinates
    of its best triangle (the one whose smallest coordinate is largest), negative parts
    clipped and the rest rescaled to sum 1.

    Examples
    --------
    >>> w = interpolation_weights([[0.0, 0.0], [0.0, 4.0]], (1, 5))
    >>> w[1, 0].tolist()
    [0.0, 0.25, 0.5, 0.75, 1.0]
    """
    try:
        pos = np.asarray(positions_yx, dtype=np.float64)
    except (ValueError, TypeError) as exc:
        raise ShapeError(f"positions_yx must be K rows of two numbers (y, x); got "
                         f"{positions_yx!r}") from exc
    if pos.ndim != 2 or pos.shape[1] != 2 or pos.shape[0] < 1:
        raise ShapeError(f"positions_yx must have shape (K, 2) with K >= 1; got {pos.shape}")
    if not np.isfinite(pos).all():
        raise DataError("positions_yx contains NaN or Inf; give every position as y_px, x_px")
    k = pos.shape[0]
    ny, nx = shape_yx
    yy, xx = np.meshgrid(np.arange(ny, dtype=np.float64), np.arange(nx, dtype=np.float64),
                         indexing="ij")
    pixels = np.stack([yy.ravel(), xx.ravel()], axis=1)
    if k == 1:
        return np.ones((1, ny, nx))
    gaps = np.linalg.norm(pos[:, None] - pos[None], axis=-1) + np.eye(k)
    if gaps.min() < 1e-9:
        i, j = np.unravel_index(int(np.argmin(gaps)), gaps.shape)
        raise DataError(f"positions {i} and {j} coincide at {pos[i].tolist()}; each field "
                        "position must be measured once")
    centred = pos - pos.mean(axis=0)
    _, sv, vt = np.linalg.svd(centred, full_matrices=False)
    if sv.size < 2 or sv[1] <= 1e-9 * sv[0]:
        weights = _line_weights(centred @ vt[0], (pixels - pos.mean(axis=0)) @ vt[0])
    else:
        weights = _triangle_weights(pos, pixels)
    return weights.reshape(k, ny, nx)


def _line_weights(nodes: np.ndarray, samples: np.ndarray) -> np.ndarray:
    order = np.argsort(nodes)
    sorted_nodes = nodes[order]
    weights = np.zeros((nodes.size, samples.size))
    t = np.clip(samples, sorted_nodes[0], sorted_nodes[-1])
    right = np.clip(np.searchsorted(sorted_nodes, t, side="right"), 1, nodes.size - 1)
    left = right - 1
    frac = (t - sorted_nodes[left]) / (sorted_nodes[right] - sorted_nodes[left])
    columns = np.arange(samples.size)
    weights[order[left], columns] += 1.0 - frac
    weights[order[right], columns] += frac
    return weights


def _triangle_weights(pos: np.ndarray, pixels: np.ndarray) -> np.ndarray:
    from scipy.spatial import Delaunay

    tri = Delaunay(pos)
    best = np.full(pixels.shape[0], -np.inf)
    best_simplex = np.zeros(pixels.shape[0], dtype=np.intp)
    best_coords = np.zeros((pixels.shape[0], 3))
    for s in range(tri.nsimplex):
        transform = tri.transform[s]
        partial = (pixels - transform[2]) @ transform[:2].T
        coords = np.column_stack([partial, 1.0 - partial.sum(axis=1)])
        score = coords.min(axis=1)
        better = score > best
        best[better] = score[better]
        best_simplex[better] = s
        best_coords[better] = coords[better]
    best_coords = np.clip(best_coords, 0.0, None)
    best_coords /= best_coords.sum(axis=1, keepdims=True)
    weights = np.zeros((pos.shape[0], pixels.shape[0]))
    columns = np.arange(pixels.shape[0])
    vertices = tri.simplices[best_simplex]
    for corner in range(3):
        np.add.at(weights, (vertices[:, corner], columns), best_coords[:, corner])
    return weights


class FieldVaryingPSF(PSFModel):
    """Spatially varying model: K registered kernels per depth blended by field weights [1]_.

    The response at sensor pixel ``x`` to a point at ``(z, x′)`` is
    ``h_z(x; x′) = Σ_k w_k(x′) g_{z,k}(x − x′)``, so

    ``forward(v) = Σ_z Σ_k g_{z,k} ⊛ (w_k ⊙ v_z)``,  ``adjoint(b)_z = Σ_k w_k ⊙ (g_{z,k} ⋆ b)``

    (⋆: correlation, the exact adjoint of the cropped linear convolution). Kernels follow the
    centre convention of :class:`~volrecon.models.DepthConvolutionPSF`: a point at
    ``(z, Y//2, X//2)`` gives ``Σ_k w_k(Y//2, X//2) g_{z,k}``.

    Parameters
    ----------
    kernels_zkyx : ndarray of shape (Z, K, Y, X)
        Kernel ``k`` of plane ``z``: the PSF measured at field position ``k``, shifted onto the
        sensor centre.
    weights : ndarray of shape (K, Y, X) or (Z, K, Y, X)
        Field weights ``w_k(x′)`` on the volume grid, shared by all depths or one set per
        depth. See :func:`interpolation_weights`.
    geometry : Geometry
        Physical sampling of the volume planes.
    positions_yx : array_like of shape (K, 2), optional
        Where the kernels were measured, sensor pixels ``(y, x)``; kept as metadata.
    dtype : {float32, float64}
        Working precision.
    backend : Backend, optional
        Device and FFT threads. Default: CPU, all cores.
    calibration : dict, optional
        JSON-serialisable facts about how the model was made; saved with it.

    Raises
    ------
    ShapeError
        If the arrays' shapes do not fit together.
    DataError
        If an array holds NaN or Inf.

    Notes
    -----
    Cost: ``forward`` Z·K forward real 2-D FFTs and one inverse; ``adjoint`` one forward and
    Z·K inverse. K times the cost of the shift-invariant model. The model is not
    shift-invariant, so :meth:`transfer_functions` is None and ADMM cannot use its exact
    Fourier-domain volume update with it.

    References
    ----------
    .. [1] D. Flicker, F. Rigaut, "Anisoplanatic deconvolution of adaptive optics images",
       J. Opt. Soc. Am. A 22 (2005) 504-513.

    Examples
    --------
    >>> import numpy as np
    >>> from volrecon.models import FieldVaryingPSF, Geometry
    >>> kernels = np.zeros((2, 2, 8, 8), np.float32); kernels[:, :, 4, 4] = 1.0
    >>> model = FieldVaryingPSF.from_positions(kernels, [[2, 2], [6, 6]], Geometry(2.0, 0.5))
    >>> model.shape_in, model.n_kernels
    ((2, 8, 8), 2)
    """

    kind = "field-varying"

    def __init__(self, kernels_zkyx: Any, weights: Any, geometry: Geometry, *,
                 positions_yx: Any = None, dtype: Any = np.float32,
                 backend: Backend | None = None,
                 calibration: dict[str, Any] | None = None) -> None:
        backend = backend or get_backend("cpu")
        kernels = np.asarray(kernels_zkyx if isinstance(kernels_zkyx, np.ndarray)
                             else backend.to_numpy(kernels_zkyx))
        w = np.asarray(weights if isinstance(weights, np.ndarray) else backend.to_numpy(weights))
        if kernels.ndim != 4 or min(kernels.shape) < 1:
            raise ShapeError(f"kernels_zkyx must have 4 non-empty axes (Z, K, Y, X); got shape "
                             f"{kernels.shape}")
        z, k, ny, nx = kernels.shape
        if w.shape not in ((k, ny, nx), (z, k, ny, nx)):
            raise ShapeError(f"weights must have shape (K, Y, X) = {(k, ny, nx)} or "
                             f"(Z, K, Y, X) = {(z, k, ny, nx)}; got {w.shape}")
        if not (np.isfinite(kernels).all() and np.isfinite(w).all()):
            raise DataError("kernels_zkyx or weights contains NaN or Inf; clean the PSF "
                            "stacks first")
        super().__init__((z, ny, nx), dtype, geometry, backend)
        self.kernels_zkyx = np.array(kernels, dtype=self.dtype)
        self.weights = np.array(w, dtype=self.dtype)
        self.kernels_zkyx.setflags(write=False)
        self.weights.setflags(write=False)
        if positions_yx is None:
            self.positions_yx: np.ndarray | None = None
        else:
            pos = np.array(positions_yx, dtype=np.float64)
            if pos.shape != (k, 2):
                raise ShapeError(f"positions_yx must have shape (K, 2) = ({k}, 2); got "
                                 f"{pos.shape}")
            pos.setflags(write=False)
            self.positions_yx = pos
        self.calibration: dict[str, Any] = dict(calibration or {})
        # One weight set per depth on the device: (Z, K, Y, X) or broadcastable (1, K, Y, X).
        self._weights = backend.asarray(self.weights if self.weights.ndim == 4
                                        else self.weights[None])
        self._spectra = psf_spectra(backend.asarray(self.kernels_zkyx), self.padded_shape,
                                    backend)

    @classmethod
    def from_positions(cls, kernels_zkyx: Any, positions_yx: Any, geometry: Geometry, *,
                       dtype: Any = np.float32, backend: Backend | None = None,
                       calibration: dict[str, Any] | None = None) -> FieldVaryingPSF:
        """Model whose weights interpolate linearly between the measured `positions_yx`.

        Parameters
        ----------
        kernels_zkyx : ndarray of shape (Z, K, Y, X)
            Centred kernels, one per depth and field position.
        positions_yx : array_like of shape (K, 2)
            Field position of each kernel in sensor pixels ``(y, x)``.
        geometry, dtype, backend, calibration
            As for the constructor.

        Raises
        ------
        ShapeError
            If there are not as many positions as kernels per depth.
        """
        kernels = np.asarray(kernels_zkyx)
        if kernels.ndim != 4:
            raise ShapeError(f"kernels_zkyx must have 4 axes (Z, K, Y, X); got shape "
                             f"{kernels.shape}")
        pos = np.asarray(positions_yx, dtype=np.float64)
        if pos.ndim != 2 or pos.shape[0] != kernels.shape[1]:
            raise ShapeError(f"positions_yx must give one (y, x) per kernel: shape "
                             f"({kernels.shape[1]}, 2); got {pos.shape}")
        weights = interpolation_weights(pos, kernels.shape[-2:])
        return cls(kernels, weights, geometry, positions_yx=pos, dtype=dtype, backend=backend,
                   calibration=calibration)

    @property
    def n_kernels(self) -> int:
        """Number of field positions K."""
        return int(self.kernels_zkyx.shape[1])

    def psf_at(self, y: int, x: int) -> np.ndarray:
        """The blended PSF stack for a point at sensor pixel ``(y, x)``, shape (Z, Y, X)."""
        w = self.weights[..., y, x]  # (K,) or (Z, K)
        w = np.broadcast_to(w, self.kernels_zkyx.shape[:2])
        return np.asarray(np.einsum("zk,zkyx->zyx", w, self.kernels_zkyx))

    def _forward(self, volumes: Array) -> Array:
        shape = self.padded_shape
        total = None
        for k in range(self.n_kernels):
            weighted = volumes * self._weights[:, k]
            spectra = self.backend.rfft2(weighted, shape)
            spectra *= self._spectra[:, k]
            part = spectra.sum(axis=-3)
            total = part if total is None else total + part
        return self.backend.irfft2_window(total, shape, self.shape_out)

    def _adjoint(self, images: Array) -> Array:
        be = self.backend
        shape = self.padded_shape
        spectrum = be.rfft2(images, shape)
        be.xp.conjugate(spectrum, out=spectrum)
        spectrum = spectrum[:, None]
        total = None
        for k in range(self.n_kernels):
            # Correlation with g_{z,k}: index-reversed window of the convolution with conj(B̂).
            planes = be.irfft2_window(spectrum * self._spectra[:, k], shape, self.shape_out,
                                      reverse=True)
            part = planes * self._weights[:, k]
            total = part if total is None else total + part
        return be.xp.ascontiguousarray(total)

    def store_arrays(self) -> dict[str, np.ndarray]:
        return {"kernels": self.kernels_zkyx, "weights": self.weights}

    def store_attributes(self) -> dict[str, Any]:
        positions = None if self.positions_yx is None else self.positions_yx.tolist()
        return {"n_kernels": self.n_kernels, "positions_yx": positions,
                "calibration": self.calibration}

    @classmethod
    def from_store(cls, arrays: dict[str, np.ndarray], attributes: dict[str, Any],
                   geometry: Geometry, dtype: Any) -> FieldVaryingPSF:
        return cls(arrays["kernels"], arrays["weights"], geometry,
                   positions_yx=attributes.get("positions_yx"), dtype=dtype,
                   calibration=attributes.get("calibration"))

    def with_backend(self, backend: Backend) -> FieldVaryingPSF:
        model = FieldVaryingPSF(self.kernels_zkyx, self.weights, self.geometry,
                                positions_yx=self.positions_yx, dtype=self.dtype,
                                backend=backend, calibration=self.calibration)
        model._norm_cache.update(self._norm_cache)
        return model

    def __reduce__(self) -> tuple[Any, ...]:
        return (_rebuild, (self.kernels_zkyx, self.weights, self.geometry, self.positions_yx,
                           self.dtype.str, self.calibration, self._norm_cache.get("value")))


def _rebuild(kernels: np.ndarray, weights: np.ndarray, geometry: Geometry,
             positions: np.ndarray | None, dtype: str, calibration: dict[str, Any],
             norm: float | None) -> FieldVaryingPSF:
    model = FieldVaryingPSF(kernels, weights, geometry, positions_yx=positions, dtype=dtype,
                            calibration=calibration)
    model._seed_norm(norm)
    return model

