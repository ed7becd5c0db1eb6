"""Periodically shift-variant PSF model: a lenslet array at the image plane."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.backend import Backend, get_backend
from volrecon.errors import DataError, ShapeError
from volrecon.models.base import Geometry, PSFModel

if TYPE_CHECKING:
    from volrecon._typing import Array

__all__ = ["LensletPSF"]


class LensletPSF(PSFModel):
    """Volume → frame for a PSF that repeats with the lenslet pitch of ``N`` pixels.

    The sensor image of a point depends on where the point sits within its lenslet (``N × N``
    sub-positions) and moves rigidly by whole pitches: a unit point at voxel
    ``(z, y0 + i + kN, x0 + j + lN)`` gives ``psf[z, i, j]`` shifted by ``(kN, lN)``, zero
    outside (linear, not circular), where ``y0 = N·((Y//2)//N)`` and ``x0 = N·((X//2)//N)``
    mark the lenslet block that holds the sensor centre. The volume is sampled on the sensor's
    pixel grid.

    Parameters
    ----------
    psf : ndarray of shape (Z, N, N, Y, X)
        ``psf[z, i, j]``: sensor image of a unit point at voxel ``(z, y0 + i, x0 + j)``, used
        exactly as given (no normalisation).
    geometry : Geometry
        Physical sampling of the volume planes.
    dtype : {float32, float64}
        Working precision; spectra are complex64 or complex128.
    backend : Backend, optional
        Device and FFT threads. Default: CPU, all cores.
    calibration : dict, optional
        JSON-serialisable facts about how the model was made; saved with it.

    Raises
    ------
    ShapeError
        If `psf` is not (Z, N, N, Y, X) with equal sub-position axes, or the lenslet block
        holding the sensor centre does not fit on the sensor (``N > Y`` or ``N > X``).
    DataError
        If `psf` holds NaN or Inf.

    Notes
    -----
    Write ``Q = ceil(Y/N)`` and split both the volume and the frame into their ``N²``
    polyphase components on the coarse lattice of lenslets: ``u_{z,s}[k] = v_z[s + Nk]`` for
    sub-position ``s = (i, j)`` and ``b_r[m] = b[r + Nm]`` for the sensor phase
    ``r = (ry, rx)`` (both zero-padded to ``Q × Q``). With the kernel phases
    ``g_{z,s,r}[n] = psf[z, s](r + Nn)`` the model is a sum of coarse linear convolutions

    .. math::

        b_r[m] = \\sum_z \\sum_s \\sum_k u_{z,s}[k]\\, g_{z,s,r}[m - k + K],
        \\qquad K = ((Y//2)//N, (X//2)//N),

    and the adjoint is the matching sum of correlations,
    ``(Aᵀb)_{z,s}[k] = Σ_r Σ_m g_{z,s,r}[m - k + K] b_r[m]``. Each coarse convolution is
    circular on a zero-padded grid of ``G = next_fast_len(Q + D)`` per axis, with real
    FFTs, where ``D ≤ Q - 1`` is how many lenslets the kernel phases reach from their centre
    ``K`` (read off the stack's non-zero rows and columns): then no index ``m - k`` of the
    kept window wraps onto a non-zero tap, so the circular result equals the linear one.
    Responses confined to a few lenslets (the usual case) make ``G`` close to ``Q`` instead
    of ``2Q - 1``.

    Cost. ``forward`` takes Z·N² forward and N² inverse coarse transforms, ``adjoint`` N²
    forward and Z·N² inverse (a coarse transform is about ``1/N²`` of one on the full grid),
    plus, per coarse frequency ``f``, one product with the ``Z·N² × N²`` matrix ``Ĝ(f)``:
    ``Ĝ(f)ᵀ @ (Z·N², B)`` forward, ``Ĝ(f) @ (N², B)`` adjoint, all frequencies
    in one batched BLAS call split over the FFT threads. The matrices are stored once, in
    that layout, ``Z·N⁴·G_y·(G_x//2 + 1)`` complex numbers (about the size of the stack on
    the ``G·N`` grid); for one frame the products read them from memory and that reading,
    not arithmetic, sets their time. It grows as ``N²`` against the transforms' ``log G``,
    so the products dominate for large pitches. The other exact formulation, ``N²``
    full-grid convolutions per depth of the volume masked to each sub-lattice, needs the
    same Z·N⁴ products per coarse frequency (``Z·N²`` per full-grid frequency) and ``N²``
    times more transform work (Z·N² full-grid transforms), so it is never cheaper and is
    not offered.

    The model is not shift-invariant, so :meth:`transfer_functions` is None and ADMM's
    exact Fourier-domain volume update does not apply: use FISTA or RL (``reconstruct`` refuses
    ADMM in one line naming them). Why not an exact ADMM: in the DFT of the fine padded grid
    the model couples each input frequency to its ``N²`` aliases one lattice period apart, so
    per coarse frequency the volume update is a ``Z·N²`` system, diagonal plus ``μ₁ BᴴB``
    with ``B`` of size ``N² × Z·N²``. Woodbury solves it exactly with one ``N² × N²``
    factorisation per coarse frequency, but refactoring whenever ADMM adapts μ costs about
    ``Z·N⁴`` complex products per fine-grid frequency (hundreds of FFT-bound iterations for
    N = 5), more than FISTA needs to converge.

    Examples
    --------
    >>> import numpy as np
    >>> from volrecon.models import Geometry, LensletPSF
    >>> psf = np.zeros((1, 2, 2, 8, 8), np.float32)
    >>> psf[0, 1, 0, 2, 3] = 1.0          # sub-position (1, 0) lights pixel (2, 3)
    >>> model = LensletPSF(psf, Geometry(2.0, 0.5))
    >>> model.lenslet_pitch, model.block_origin_yx
    (2, (4, 4))
    >>> point = np.zeros(model.shape_in, np.float32)
    >>> point[0, 4 + 1 + 2, 4 + 0 - 2] = 1.0   # same sub-position, one lenslet down and left
    >>> image = model.forward(point)
    >>> [int(c) for c in np.unravel_index(np.argmax(image), image.shape)]
    [4, 1]
    >>> round(float(image.sum()), 5)
    1.0
    """

    kind = "lenslet"

    def __init__(self, psf: Any, geometry: Geometry, *, dtype: Any = np.float32,
                 backend: Backend | None = None,
                 calibration: dict[str, Any] | None = None) -> None:
        backend = backend or get_backend("cpu")
        host = np.asarray(psf if isinstance(psf, np.ndarray) else backend.to_numpy(psf))
        if host.ndim != 5 or min(host.shape) < 1 or host.shape[1] != host.shape[2]:
            raise ShapeError(f"psf must have 5 non-empty axes (Z, N, N, Y, X) with N the "
                             f"lenslet pitch in pixels; got shape {host.shape}")
        nz, n, _, ny, nx = host.shape
        origin = (n * ((ny // 2) // n), n * ((nx // 2) // n))
        if origin[0] + n > ny or origin[1] + n > nx:
            raise ShapeError(f"psf of shape {host.shape}: the {n}×{n} lenslet block at "
                             f"{origin} holding the sensor centre does not fit on the "
                             f"{ny}×{nx} sensor; the lenslet pitch must not exceed the "
                             "sensor size")
        if not np.isfinite(host).all():
            raise DataError("psf contains NaN or Inf; clean the PSF stack first")
        super().__init__((nz, ny, nx), dtype, geometry, backend)
        self.psf = np.array(host, dtype=self.dtype)  # private copy: inputs are never modified
        self.psf.setflags(write=False)
        self.lenslet_pitch: int = int(n)
        self.block_origin_yx: tuple[int, int] = origin
        self.calibration: dict[str, Any] = dict(calibration or {})
        self._grid = self._coarse_grid()
        self._spectra = self._phase_spectra()

    # ------------------------------------------------------------------------- lattice
    @property
    def lattice_shape(self) -> tuple[int, int]:
        """Lenslets covering the sensor, ``(ceil(Y/N), ceil(X/N))``."""
        n = self.lenslet_pitch
        ny, nx = self.shape_out
        return (-(-ny // n), -(-nx // n))

    @property
    def lattice_padded_shape(self) -> tuple[int, int]:
        """Coarse FFT grid: ``next_fast_len(Q + D)`` per axis, ``D`` the reach of the kernel
        phases from their centre in lenslets (at most ``Q - 1``; see the class Notes)."""
        return self._grid

    def _coarse_grid(self) -> tuple[int, int]:
        """The smallest fast grid on which the coarse circular convolutions stay linear."""
        import scipy.fft

        n = self.lenslet_pitch
        grid = []
        for axis, (q, k0) in enumerate(zip(self.lattice_shape, self.block_origin_yx,
                                           strict=True)):
            lit = np.flatnonzero(np.any(self.psf != 0, axis=tuple(a for a in range(5)
                                                                  if a != 3 + axis)))
            reach = 0 if lit.size == 0 else max(int(lit[-1]) // n - k0 // n,
                                                k0 // n - int(lit[0]) // n, 0)
            grid.append(scipy.fft.next_fast_len(q + min(reach, q - 1), real=True))
        return (grid[0], grid[1])

    def _phase_spectra(self) -> Array:
        """Spectra ``Ĝ`` of the kernel phases, centre at ``K``: (F, Z·N², N²) with
        ``F = Gy·(Gx//2+1)``, frequency first and depth with sub-position on one axis, so
        that each application is one batched matrix product."""
        be = self.backend
        n = self.lenslet_pitch
        nz, ny, nx = self.shape_in
        qy, qx = self.lattice_shape
        grid = self.lattice_padded_shape
        padded = np.zeros((nz, n, n, qy * n, qx * n), dtype=self.dtype)
        padded[..., :ny, :nx] = self.psf
        # [z, i, j, m, ry, l, rx] = psf[z, i, j, ry + N m, rx + N l] → [z, s, r, m, l]
        phases = (padded.reshape(nz, n, n, qy, n, qx, n).transpose(0, 1, 2, 4, 6, 3, 5)
                  .reshape(nz * n * n, n * n, qy, qx))
        placed = np.zeros((*phases.shape[:2], *grid), dtype=self.dtype)
        placed[..., :qy, :qx] = phases
        k0 = (self.block_origin_yx[0] // n, self.block_origin_yx[1] // n)
        placed = np.roll(placed, (-k0[0], -k0[1]), axis=(-2, -1))
        spectra = be.rfft2(be.asarray(placed), grid)
        spectra = spectra.reshape(*spectra.shape[:2], -1).transpose(2, 0, 1)
        return be.xp.ascontiguousarray(spectra)

    def _split(self, planes: Array) -> Array:
        """(..., Y, X) → (..., N², Q_y, Q_x): the polyphase components, zero-padded."""
        xp = self.backend.xp
        n = self.lenslet_pitch
        ny, nx = self.shape_out
        qy, qx = self.lattice_shape
        lead = planes.shape[:-2]
        padded = xp.zeros((*lead, qy * n, qx * n), dtype=self.dtype)
        padded[..., :ny, :nx] = planes
        split = padded.reshape(-1, qy, n, qx, n).transpose(0, 2, 4, 1, 3)
        return xp.ascontiguousarray(split).reshape(*lead, n * n, qy, qx)

    def _merge(self, phases: Array) -> Array:
        """Inverse of :meth:`_split`: (B, N², Q_y, Q_x) → (B, Y, X), the padding dropped."""
        n = self.lenslet_pitch
        ny, nx = self.shape_out
        qy, qx = self.lattice_shape
        full = phases.reshape(-1, n, n, qy, qx).transpose(0, 3, 1, 4, 2)
        return full.reshape(-1, qy * n, qx * n)[:, :ny, :nx]

    def _products(self, left: Array, right: Array, out: Array) -> Array:
        """``out[f] = left[f] @ right[f]`` for every frequency ``f``, the frequencies split
        over the FFT threads (BLAS releases the GIL; each call is one matrix product)."""
        be = self.backend
        if be.device != "cpu":
            return be.xp.matmul(left, right, out=out)
        be.run_split(_matmul_range, out.shape[0], left, right, out)
        return out

    # ------------------------------------------------------------------------- application
    def _forward(self, volumes: Array) -> Array:
        be = self.backend
        grid = self.lattice_padded_shape
        batch, pairs = volumes.shape[0], self.lenslet_pitch**2
        freqs, inputs = self._spectra.shape[:2]
        spectra = be.rfft2(self._split(volumes).reshape(batch, inputs, *self.lattice_shape),
                           grid)  # (B, Z·S, Gy, Gxh)
        # Σ_{z,s} Ĝ_{z,s,r}(f) Û_{z,s}(f): per frequency, (R, Z·S) @ (Z·S, B). A matrix
        # times columns runs in BLAS at memory speed (the transposed view costs nothing);
        # rows times a matrix, (B, Z·S) @ (Z·S, R), measured 3-5× slower for one frame.
        columns = be.xp.ascontiguousarray(
            spectra.reshape(batch, inputs, freqs).transpose(2, 1, 0))
        total = self._products(self._spectra.transpose(0, 2, 1), columns,
                               be.xp.empty((freqs, pairs, batch), dtype=self._spectra.dtype))
        total = be.xp.ascontiguousarray(total.transpose(2, 1, 0))
        phases = be.irfft2_window(total.reshape(batch, pairs, grid[0], -1), grid,
                                  self.lattice_shape, overwrite=True)
        return be.xp.ascontiguousarray(self._merge(phases))

    def _adjoint(self, images: Array) -> Array:
        # Correlation with g: irfft2(conj(Ĝ)·B̂) is, for real signals, the circular index
        # reversal of irfft2(Ĝ·conj(B̂)), summed here over the sensor phases r.
        be = self.backend
        grid = self.lattice_padded_shape
        batch, pairs = images.shape[0], self.lenslet_pitch**2
        freqs, inputs = self._spectra.shape[:2]
        spectrum = be.rfft2(self._split(images), grid)  # (B, R, Gy, Gxh)
        be.xp.conjugate(spectrum, out=spectrum)
        spectrum = be.xp.ascontiguousarray(spectrum.reshape(batch, pairs, -1).transpose(2, 1, 0))
        # Σ_r Ĝ_{z,s,r}(f) conj(B̂_r)(f): per frequency, (Z·S, R) @ (R, B).
        planes = self._products(self._spectra, spectrum,
                                be.xp.empty((freqs, inputs, batch), dtype=spectrum.dtype))
        planes = be.xp.ascontiguousarray(planes.transpose(2, 1, 0))
        phases = be.irfft2_window(planes.reshape(batch * inputs, grid[0], -1), grid,
                                  self.lattice_shape, reverse=True, overwrite=True)
        merged = self._merge(phases)  # (B·Z, Y, X)
        return be.xp.ascontiguousarray(merged).reshape(batch, *self.shape_in)

    # ------------------------------------------------------------------------- storage
    def store_arrays(self) -> dict[str, np.ndarray]:
        return {"psf": self.psf}

    def store_attributes(self) -> dict[str, Any]:
        return {"lenslet_pitch": self.lenslet_pitch, "calibration": self.calibration}

    @classmethod
    def from_store(cls, arrays: dict[str, np.ndarray], attributes: dict[str, Any],
                   geometry: Geometry, dtype: Any) -> LensletPSF:
        model = cls(arrays["psf"], geometry, dtype=dtype,
                    calibration=attributes.get("calibration"))
        pitch = attributes.get("lenslet_pitch", model.lenslet_pitch)
        if pitch != model.lenslet_pitch:
            raise DataError(f"attribute 'parameters/lenslet_pitch' is {pitch!r} but array "
                            f"'psf' has {model.lenslet_pitch}×{model.lenslet_pitch} "
                            "sub-positions; re-run calibration")
        return model

    def with_backend(self, backend: Backend) -> LensletPSF:
        model = LensletPSF(self.psf, self.geometry, dtype=self.dtype, backend=backend,
                           calibration=self.calibration)
        model._norm_cache.update(self._norm_cache)
        return model

    def __reduce__(self) -> tuple[Any, ...]:
        # Pickle the PSF, not the spectra (4× the bytes); the receiver rebuilds them.
        return (_rebuild, (self.psf, self.geometry, self.dtype.str,
                           self._norm_cache.get("value"), self.calibration))


def _rebuild(psf: np.ndarray, geometry: Geometry, dtype: str, norm: float | None,
             calibration: dict[str, Any]) -> LensletPSF:
    model = LensletPSF(psf, geometry, dtype=dtype, calibration=calibration)
    model._seed_norm(norm)
    return model


def _matmul_range(left: np.ndarray, right: np.ndarray, out: np.ndarray, lo: int, hi: int) -> None:
    np.matmul(left[lo:hi], right[lo:hi], out=out[lo:hi])
