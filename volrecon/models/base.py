"""The operator interface every PSF model implements.

A PSF model maps a volume ``(Z, Y, X)`` to a camera frame ``(Y, X)``. Solvers only use
:meth:`PSFModel.forward`, :meth:`PSFModel.adjoint`, :meth:`PSFModel.operator_norm_squared`
and, where a model has one, :meth:`PSFModel.transfer_functions` (the exact Fourier form of a
shift-invariant model that ADMM's closed-form volume update needs). Subclasses implement the
private ``_forward`` / ``_adjoint`` on arrays with one leading batch axis; this base class checks
shapes and dtypes and handles any number of leading frame axes.
"""

from __future__ import annotations

import math
import threading
from abc import ABC, abstractmethod
from collections.abc import Callable, Hashable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from volrecon.backend import Backend, get_backend
from volrecon.errors import ConfigError, ShapeError

if TYPE_CHECKING:
    from volrecon._typing import Array

__all__ = ["Geometry", "PSFModel"]


#: Guards every model's solver cache (held only to look up and store, never to compute).
_SOLVER_CACHE_LOCK = threading.Lock()


@dataclass(frozen=True)
class Geometry:
    """Physical sampling of a model's volume grid.

    Attributes
    ----------
    depth_step_um : float
        Axial distance between volume planes, micrometres (> 0).
    pixel_size_um : float
        Lateral pixel pitch in the sample plane, micrometres (> 0).
    depth_start_um : float
        Depth of plane 0, micrometres.
    """

    depth_step_um: float
    pixel_size_um: float
    depth_start_um: float = 0.0

    def __post_init__(self) -> None:
        for name in ("depth_step_um", "pixel_size_um"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ConfigError(f"{name} must be a positive number of micrometres; got {value!r}")
        if not math.isfinite(self.depth_start_um):
            raise ConfigError(f"depth_start_um must be finite; got {self.depth_start_um!r}")


class PSFModel(ABC):
    """A linear map from a volume ``(Z, Y, X)`` to a sensor image ``(Y, X)``.

    Build one with :meth:`from_stack` (a measured or simulated PSF stack, used as given), from
    calibration (:mod:`volrecon.calibrate`), or :meth:`load` a saved one.

    Attributes
    ----------
    shape_in : tuple of int
        ``(Z, Y, X)`` of the volume.
    shape_out : tuple of int
        ``(Y, X)`` of the sensor.
    dtype : numpy dtype
        float32 (default) or float64.
    geometry : Geometry
        Physical sampling.
    """

    #: Name of this model kind in a saved store.
    kind: ClassVar[str]

    def __init__(self, shape_in: tuple[int, int, int], dtype: Any, geometry: Geometry,
                 backend: Backend) -> None:
        nz, ny, nx = (int(n) for n in shape_in)
        self.shape_in: tuple[int, int, int] = (nz, ny, nx)
        self.shape_out: tuple[int, int] = (ny, nx)
        self.dtype = np.dtype(dtype)
        if self.dtype not in (np.float32, np.float64):
            raise ConfigError(f"model dtype must be float32 or float64; got {self.dtype}")
        self.geometry = geometry
        self.backend = backend
        # Filled at most once by operator_norm_squared(); every worker may compute the same value.
        self._norm_cache: dict[str, float] = {}
        self._solver_cache: dict[Hashable, Any] = {}

    # ----------------------------------------------------------------- construction & storage
    @classmethod
    def from_stack(cls, psf_zyx: Any, depth_step_um: float, pixel_size_um: float,
                   depth_start_um: float = 0.0, *, dtype: Any = np.float32,
                   lenslet_pitch: int | None = None) -> PSFModel:
        """Model of a PSF stack, used as given.

        A (Z, Y, X) stack gives the shift-invariant model whose plane ``i`` response is
        ``psf_zyx[i]`` (:class:`volrecon.models.DepthConvolutionPSF`). With `lenslet_pitch`
        ``N``, a (Z, N, N, Y, X) stack of responses to the ``N × N`` sub-positions of a
        lenslet gives the periodically shift-variant model
        (:class:`volrecon.models.LensletPSF`).

        Raises
        ------
        ShapeError
            If a 5-D stack comes without `lenslet_pitch`, or its sub-position axes are not
            ``(N, N)``.
        """
        from volrecon.models.depth_convolution import DepthConvolutionPSF
        from volrecon.models.periodic import LensletPSF

        geometry = Geometry(depth_step_um, pixel_size_um, depth_start_um)
        shape = tuple(np.shape(psf_zyx))
        if lenslet_pitch is None and len(shape) == 5:
            raise ShapeError(f"a PSF stack of shape {shape} has 5 axes (Z, N, N, Y, X); pass "
                             f"lenslet_pitch={shape[1]} for a lenslet-array model, or a "
                             "(Z, Y, X) stack")
        if lenslet_pitch is None:
            return DepthConvolutionPSF(psf_zyx, geometry, dtype=dtype)
        if len(shape) != 5 or shape[1:3] != (lenslet_pitch, lenslet_pitch):
            raise ShapeError(f"lenslet_pitch={lenslet_pitch} needs a stack of shape (Z, "
                             f"{lenslet_pitch}, {lenslet_pitch}, Y, X); got {shape}")
        return LensletPSF(psf_zyx, geometry, dtype=dtype)

    def save(self, path: Any) -> None:
        """Write this model as a zarr store at `path` (see ``schemas/psf-model.schema.json``)."""
        from volrecon.models.store import save_model

        save_model(self, path)

    @staticmethod
    def load(path: Any) -> PSFModel:
        """Read a model written by :meth:`save`; raises ModelStoreError if `path` is not one."""
        from volrecon.models.store import load_model

        return load_model(path)

    @abstractmethod
    def store_arrays(self) -> dict[str, np.ndarray]:
        """Arrays that describe this model completely, by store key (host memory)."""

    def store_attributes(self) -> dict[str, Any]:
        """Extra JSON attributes of this kind (beyond geometry, kind and dtype)."""
        return {}

    @classmethod
    @abstractmethod
    def from_store(cls, arrays: dict[str, np.ndarray], attributes: dict[str, Any],
                   geometry: Geometry, dtype: Any) -> PSFModel:
        """Rebuild a model from what :meth:`store_arrays` and :meth:`store_attributes` gave."""

    @abstractmethod
    def with_backend(self, backend: Backend) -> PSFModel:
        """A copy whose precomputed arrays live on `backend` (device and FFT threads)."""

    def on_device(self, device: str = "cpu", *, threads: int | None = None) -> PSFModel:
        """A copy on `device` ("cpu" or "gpu") using `threads` FFT threads on the CPU."""
        backend = get_backend(device, threads=threads)
        if backend == self.backend:
            return self
        return self.with_backend(backend)

    # --------------------------------------------------------------------------- properties
    @property
    def n_planes(self) -> int:
        """Number of depth planes Z."""
        return self.shape_in[0]

    @property
    def depths_um(self) -> np.ndarray:
        """Depth of each plane in micrometres, shape (Z,)."""
        g = self.geometry
        return g.depth_start_um + g.depth_step_um * np.arange(self.n_planes)

    @property
    def padded_shape(self) -> tuple[int, int]:
        """Lateral size of the zero-padded FFT grid, ``next_fast_len(2N - 1)`` per axis."""
        import scipy.fft

        ny, nx = self.shape_out
        return (scipy.fft.next_fast_len(2 * ny - 1, real=True),
                scipy.fft.next_fast_len(2 * nx - 1, real=True))

    @property
    def shift_invariant(self) -> bool:
        """True when the model has :meth:`transfer_functions` (without building them)."""
        return type(self).transfer_functions is not PSFModel.transfer_functions

    def transfer_functions(self) -> Array | None:
        """Per-plane spectra ``Ĥ`` (Z, Py, Px//2+1) on the padded grid, or None.

        Only shift-invariant models have them. With them, ``forward(v)`` equals
        ``irfft2(Σ_z Ĥ_z · rfft2(v_z, padded_shape))[:Y, :X]``.
        """
        return None

    # ------------------------------------------------------------------------- application
    def forward(self, volume_zyx: Array) -> Array:
        """Sensor image of a volume: (..., Z, Y, X) → (..., Y, X)."""
        volume = self._check(volume_zyx, self.shape_in, "volume_zyx")
        lead = volume.shape[:-3]
        out = self._forward(volume.reshape((-1, *self.shape_in)))
        return out.reshape((*lead, *self.shape_out))

    def adjoint(self, image_yx: Array) -> Array:
        """Exact adjoint of :meth:`forward`: (..., Y, X) → (..., Z, Y, X)."""
        image = self._check(image_yx, self.shape_out, "image_yx")
        lead = image.shape[:-2]
        out = self._adjoint(image.reshape((-1, *self.shape_out)))
        return out.reshape((*lead, *self.shape_in))

    @abstractmethod
    def _forward(self, volumes: Array) -> Array:
        """(B, Z, Y, X) → (B, Y, X) on this model's backend."""

    @abstractmethod
    def _adjoint(self, images: Array) -> Array:
        """(B, Y, X) → (B, Z, Y, X) on this model's backend."""

    def _check(self, a: Array, shape: tuple[int, ...], name: str) -> Array:
        if tuple(a.shape[-len(shape):]) != shape or a.ndim < len(shape):
            axes = "(..., Z, Y, X)" if len(shape) == 3 else "(..., Y, X)"
            raise ShapeError(
                f"{name} must have shape {axes} = (..., {', '.join(map(str, shape))}) to match "
                f"the model; got {tuple(a.shape)}"
            )
        return self.backend.asarray(a, dtype=self.dtype)

    def operator_norm_squared(self, *, iterations: int = 30) -> float:
        """Largest eigenvalue of AᵀA (the FISTA Lipschitz constant), computed once and cached.

        Power iteration from a fixed positive seed (close to the top singular vector of a
        non-negative PSF, so it converges in a few steps), stopped when the estimate changes by
        less than 1e-4 relative or after `iterations`. The value is raised by 1 % to cover the
        small under-estimate power iteration leaves, and capped by the exact norm of the
        uncropped circular operator, ``max_f Σ_z |Ĥ_z(f)|²``, where the model has spectra.
        Saved with the model.
        """
        cached = self._norm_cache.get("value")
        if cached is not None:
            return cached
        xp = self.backend.xp
        x = self.backend.asarray(
            np.random.default_rng(0).random(self.shape_in, dtype=np.float64), dtype=self.dtype)
        estimate = 0.0
        for _ in range(iterations):
            y = self.adjoint(self.forward(x))
            previous, estimate = estimate, float(xp.linalg.norm(y))
            if estimate == 0.0 or abs(estimate - previous) <= 1e-4 * estimate:
                break
            x = y / estimate
        value = 1.01 * estimate
        spectra = self.transfer_functions()
        if spectra is not None:
            bound = float((spectra.real**2 + spectra.imag**2).sum(axis=0).max())
            value = min(value, bound)
        self._norm_cache["value"] = value
        return value

    def sensitivity(self) -> Any:
        """``Aᵀ1``, the adjoint of an all-ones frame (Richardson–Lucy's normaliser), on the
        model's backend; computed once per model object and cached (do not modify it)."""
        return self.solver_cache("sensitivity", lambda: self.adjoint(
            self.backend.xp.ones(self.shape_out, dtype=self.dtype)))

    def solver_cache(self, key: Hashable, make: Callable[[], Any]) -> Any:
        """``make()``, computed on the first call for `key` and kept for the model's life.

        For what the solvers derive from the model alone and would otherwise recompute for
        every frame (RL's sensitivity, ADMM's spectra and factors). Not saved and not pickled:
        a worker builds its own. Safe from several threads; two racing first calls may both
        compute, and the first result is kept (the values are the same). Do not modify it.
        """
        with _SOLVER_CACHE_LOCK:
            if key in self._solver_cache:
                return self._solver_cache[key]
        value = make()
        with _SOLVER_CACHE_LOCK:
            return self._solver_cache.setdefault(key, value)

    def _seed_norm(self, value: float | None) -> None:
        if value is not None:
            self._norm_cache["value"] = float(value)

    def __repr__(self) -> str:
        z, y, x = self.shape_in
        return (f"{type(self).__name__}(Z={z}, Y={y}, X={x}, dtype={self.dtype}, "
                f"depth_step_um={self.geometry.depth_step_um}, "
                f"pixel_size_um={self.geometry.pixel_size_um}, device={self.backend.device!r})")
