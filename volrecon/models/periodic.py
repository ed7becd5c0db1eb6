"""Periodically shift-variant PSF model: a lenslet array at the image plane."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.backend import Backend, get_backend
from volrecon.errors import ConfigError, DataError, ShapeError
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
    tiles_yx : (int, int), optional
        Overlap-save tiles per lattice axis (1: the axis in one piece). Default: the cheapest
        by a cost model of the shapes and the responses' reach (see Notes). Every tiling
        gives the same operator up to rounding; the choice is not saved with the model.

    Raises
    ------
    ShapeError
        If `psf` is not (Z, N, N, Y, X) with equal sub-position axes, or the lenslet block
        holding the sensor centre does not fit on the sensor (``N > Y`` or ``N > X``).
    ConfigError
        If `tiles_yx` does not cut an axis into non-empty tiles.
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

    Tiles. With a kernel reach far below ``Q`` the matrices ``Ĝ(f)`` below are needed on
    every frequency of a grid of ``Q + D``, although the kernel phases have only
    ``T = t_max - t_min + 1`` taps per axis (``t`` the lit offsets ``n - K``). An axis may
    instead be cut into overlap-save tiles: tile ``t`` computes the outputs
    ``[tP, tP + P)`` from the inputs ``[tP - t_max, tP - t_max + P + T - 1)`` by circular
    convolutions of length ``G ≥ P + T - 1`` with the taps at ``(n - K - t_max) mod G``; no
    output of the kept window wraps onto a lit tap, so each tile is exact, and the adjoint is
    the matching overlap-add of correlations. All tiles share one set of matrices on the
    small grid: ``Z·N⁴·G_y·(G_x//2+1)`` numbers however large the sensor (a 2000² sensor,
    N = 5, Z = 16 and a reach of ±2 lenslets keeps 121 MB instead of 6.6 GB), each read once
    per application for every tile, at the price of the tiles' overlap in transform work.
    :func:`_tiling_cost` picks the tiling from the shapes alone, so a model always gives
    the same rounding.

    Cost. ``forward`` takes Z·N² forward and N² inverse coarse transforms per tile,
    ``adjoint`` N² forward and Z·N² inverse (a coarse transform is about ``1/N²`` of one on
    the full grid), plus, per coarse frequency ``f``, one product with the ``Z·N² × N²``
    matrix ``Ĝ(f)`` and one column per tile and frame: ``Ĝ(f)ᵀ`` forward, ``Ĝ(f)`` adjoint.
    On the CPU compiled loops (numba) run them, the frequencies split over the FFT threads:
    each matrix row is read once per application and used for all columns, and no BLAS
    thread pool competes with the FFT threads (nested BLAS threads made one product up to
    10× slower on a busy machine); on the GPU they are one batched ``matmul``. For one
    frame and one tile that reading, not arithmetic, sets their time; it grows as ``N²``
    against the transforms' ``log G``, so the products dominate for large pitches. The
    other exact formulation, ``N²`` full-grid convolutions per depth of the volume masked
    to each sub-lattice, needs the same Z·N⁴ products per coarse frequency (``Z·N²`` per
    full-grid frequency) and ``N²`` times more transform work (Z·N² full-grid transforms),
    so it is never cheaper and is not offered.

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
                 calibration: dict[str, Any] | None = None,
                 tiles_yx: tuple[int, int] | None = None) -> None:
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
        self._taps = (self._tap_range(0), self._tap_range(1))
        self._grid = self._coarse_grid()
        self._tiling = self._plan_tiles(tiles_yx)
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
        """Coarse FFT grid of the whole lattice in one piece: ``next_fast_len(Q + D)`` per
        axis, ``D`` the reach of the kernel phases from their centre in lenslets (at most
        ``Q - 1``; see the class Notes). Along an axis cut into tiles the transforms run on
        :attr:`tile_grid_shape` instead."""
        return self._grid

    @property
    def tiles_yx(self) -> tuple[int, int]:
        """Overlap-save tiles the lattice is cut into per axis (1: one piece)."""
        return (self._tiling[0].count, self._tiling[1].count)

    @property
    def tile_grid_shape(self) -> tuple[int, int]:
        """Coarse FFT grid the transforms and the spectrum matrices live on, per axis."""
        return (self._tiling[0].grid, self._tiling[1].grid)

    def _tap_range(self, axis: int) -> tuple[int, int]:
        """Lowest and highest lit kernel-phase offset ``n - K`` along `axis` (0: y), in
        lenslets; ``(0, 0)`` for an all-zero stack."""
        n = self.lenslet_pitch
        k0 = self.block_origin_yx[axis] // n
        lit = np.flatnonzero(np.any(self.psf != 0,
                                    axis=tuple(a for a in range(5) if a != 3 + axis)))
        if lit.size == 0:
            return (0, 0)
        return (int(lit[0]) // n - k0, int(lit[-1]) // n - k0)

    def _coarse_grid(self) -> tuple[int, int]:
        """The smallest fast grid on which the coarse circular convolutions of the whole
        lattice stay linear."""
        import scipy.fft

        grid = []
        for q, (low, high) in zip(self.lattice_shape, self._taps, strict=True):
            reach = max(high, -low, 0)
            grid.append(scipy.fft.next_fast_len(q + min(reach, q - 1), real=True))
        return (grid[0], grid[1])

    def _plan_tiles(self, tiles_yx: tuple[int, int] | None) -> tuple[_Tiles, _Tiles]:
        """Per axis, the tiling of the lattice: `tiles_yx` if given, else the cheapest by
        :func:`_tiling_cost` (a function of the shapes and the lit support only, so the
        same stack always gives the same tiling and the same rounding)."""
        options = [_axis_tilings(q, low, high, g) for q, (low, high), g
                   in zip(self.lattice_shape, self._taps, self._grid, strict=True)]
        if tiles_yx is not None:
            chosen = []
            for axis, (count, choices) in enumerate(zip(tiles_yx, options, strict=True)):
                match = [t for t in choices if t.count == int(count)]
                if not match:
                    raise ConfigError(
                        f"tiles_yx[{axis}] = {count} does not cut the {'yx'[axis]} "
                        f"axis of {self.lattice_shape[axis]} lenslets into non-empty tiles; "
                        f"choose one of {sorted(t.count for t in choices)}")
                chosen.append(match[0])
            return (chosen[0], chosen[1])
        inputs = self.n_planes * self.lenslet_pitch**2
        pairs = self.lenslet_pitch**2
        return min(((ty, tx) for ty in options[0] for tx in options[1]),
                   key=lambda t: _tiling_cost(t[0], t[1], inputs, pairs))

    def _phase_spectra(self) -> Array:
        """Spectra ``Ĝ`` of the kernel phases on the tile grid, frequency first and depth with
        sub-position on one axis: complex (F, Z·N², N²) on the GPU, real (F, Z·N², 2, N²)
        (real and imaginary rows) on the CPU, ``F = Gy·(Gx//2+1)``. The lit taps sit at
        ``(n - K - σ) mod G`` per axis (``σ`` the tiles' shift)."""
        be = self.backend
        n = self.lenslet_pitch
        nz, ny, nx = self.shape_in
        qy, qx = self.lattice_shape
        grid = self.tile_grid_shape
        padded = np.zeros((nz, n, n, qy * n, qx * n), dtype=self.dtype)
        padded[..., :ny, :nx] = self.psf
        # [z, i, j, m, ry, l, rx] = psf[z, i, j, ry + N m, rx + N l] → [z, s, r, m, l]
        phases = (padded.reshape(nz, n, n, qy, n, qx, n).transpose(0, 1, 2, 4, 6, 3, 5)
                  .reshape(nz * n * n, n * n, qy, qx))
        placed = np.zeros((*phases.shape[:2], *grid), dtype=self.dtype)
        index = []
        for axis, ((low, high), tiles) in enumerate(zip(self._taps, self._tiling,
                                                         strict=True)):
            k0 = self.block_origin_yx[axis] // n
            offsets = np.arange(low, high + 1)
            index.append((offsets + k0, (offsets - tiles.shift) % tiles.grid))
        (src_y, dst_y), (src_x, dst_x) = index
        placed[..., dst_y[:, None], dst_x[None, :]] = phases[..., src_y[:, None],
                                                             src_x[None, :]]
        spectra = be.rfft2(be.asarray(placed), grid)
        spectra = spectra.reshape(*spectra.shape[:2], -1).transpose(2, 0, 1)  # (F, I, R)
        if be.device != "cpu":
            return be.xp.ascontiguousarray(spectra)
        # The compiled products read real and imaginary rows apart: (F, I, 2, R).
        return np.ascontiguousarray(np.stack([spectra.real, spectra.imag], axis=2))

    def _split(self, planes: Array) -> Array:
        """(B, C, Y, X) → (B, C·N², Sy, Sx): the polyphase components ``u[k]``, each at
        ``k + σ`` of a zero-padded span that the tiles read (see :class:`_Tiles`)."""
        xp = self.backend.xp
        n = self.lenslet_pitch
        ny, nx = self.shape_out
        qy, qx = self.lattice_shape
        ay, ax = self._tiling
        batch, channels = planes.shape[:2]
        if (ny, nx) != (qy * n, qx * n):
            full = xp.zeros((batch, channels, qy * n, qx * n), dtype=self.dtype)
            full[..., :ny, :nx] = planes
            planes = full
        lattice = planes.reshape(batch, channels, qy, n, qx, n).transpose(0, 1, 3, 5, 2, 4)
        (ky, py), (kx, px) = ay.placement(qy), ax.placement(qx)
        out = xp.zeros((batch, channels, n, n, ay.span, ax.span), dtype=self.dtype)
        out[..., py, px] = lattice[..., ky, kx]
        return out.reshape(batch, channels * n * n, ay.span, ax.span)

    def _merge(self, spans: Array) -> Array:
        """Adjoint of :meth:`_split`: (B, C·N², Sy, Sx) → (B, C, Y, X)."""
        xp = self.backend.xp
        n = self.lenslet_pitch
        ny, nx = self.shape_out
        qy, qx = self.lattice_shape
        ay, ax = self._tiling
        batch = spans.shape[0]
        channels = spans.shape[1] // (n * n)
        (ky, py), (kx, px) = ay.placement(qy), ax.placement(qx)
        full = xp.zeros((batch, channels, qy, n, qx, n), dtype=self.dtype)
        full.transpose(0, 1, 3, 5, 2, 4)[..., ky, kx] = spans.reshape(
            batch, channels, n, n, ay.span, ax.span)[..., py, px]
        full = full.reshape(batch, channels, qy * n, qx * n)
        if (ny, nx) == (qy * n, qx * n):
            return full
        return xp.ascontiguousarray(full[..., :ny, :nx])

    def _tiles_of(self, spans: Array) -> Array:
        """(B, C, Sy, Sx) → (B, C, Ty, Tx, Ly, Lx): the tiles' inputs, a strided view."""
        ay, ax = self._tiling
        if ay.count == ax.count == 1:
            return spans[:, :, None, None]
        sb, sc, sy, sx = spans.strides
        return self.backend.xp.lib.stride_tricks.as_strided(
            spans, shape=(*spans.shape[:2], ay.count, ax.count, ay.length, ax.length),
            strides=(sb, sc, ay.step * sy, ax.step * sx, sy, sx))

    def _overlap_add(self, tiles: Array) -> Array:
        """Adjoint of :meth:`_tiles_of`: (B, C, Ty, Tx, Ly, Lx) → (B, C, Sy, Sx)."""
        ay, ax = self._tiling
        if ay.count == ax.count == 1:
            return tiles[:, :, 0, 0]
        spans = self.backend.xp.zeros((*tiles.shape[:2], ay.span, ax.span), dtype=tiles.dtype)
        for ty in range(ay.count):
            for tx in range(ax.count):
                spans[..., ty * ay.step : ty * ay.step + ay.length,
                      tx * ax.step : tx * ax.step + ax.length] += tiles[:, :, ty, tx]
        return spans

    def _mix_forward(self, columns: Array) -> Array:
        """``Σ_{z,s} Ĝ_{z,s,r}(f) Û_{z,s}(f)``: (F, Z·S, C) → (F, C, R), every column (frame
        and tile) against the one matrix of its frequency."""
        be = self.backend
        freqs, _, count = columns.shape
        pairs = self.lenslet_pitch**2
        if be.device != "cpu":
            return be.xp.matmul(columns.transpose(0, 2, 1), self._spectra)
        out = np.empty((freqs, count, pairs), dtype=columns.dtype)
        be.run_split(_kernels()[0], freqs, self._spectra, columns.view(self.dtype),
                     out.view(self.dtype))
        return out

    def _mix_adjoint(self, rows: Array) -> Array:
        """``Σ_r Ĝ_{z,s,r}(f) conj(B̂_r(f))``: (F, C, R) → (F, Z·S, C)."""
        be = self.backend
        freqs, count, _ = rows.shape
        inputs = self.n_planes * self.lenslet_pitch**2
        if be.device != "cpu":
            return be.xp.matmul(self._spectra, be.xp.conjugate(rows).transpose(0, 2, 1))
        out = np.empty((freqs, inputs, count), dtype=rows.dtype)
        be.run_split(_kernels()[1], freqs, self._spectra, rows.view(self.dtype),
                     out.view(self.dtype))
        return out

    # ------------------------------------------------------------------------- application
    def _forward(self, volumes: Array) -> Array:
        be, xp = self.backend, self.backend.xp
        ay, ax = self._tiling
        grid = self.tile_grid_shape
        batch, pairs, n = volumes.shape[0], self.lenslet_pitch**2, self.lenslet_pitch
        freqs, inputs = self._spectra.shape[:2]
        columns = batch * ay.count * ax.count
        spectra = be.rfft2(self._tiles_of(self._split(volumes)), grid)  # (B, Z·S, Ty, Tx, F)
        stacked = xp.ascontiguousarray(
            spectra.reshape(batch, inputs, ay.count * ax.count, freqs).transpose(3, 1, 0, 2))
        total = self._mix_forward(stacked.reshape(freqs, inputs, columns))  # (F, B·T, R)
        total = xp.ascontiguousarray(
            total.reshape(grid[0], -1, batch, ay.count, ax.count, pairs)
            .transpose(2, 5, 3, 4, 0, 1))
        tiles = be.irfft2_window(total, grid, (ay.step, ax.step), overwrite=True)
        # [b, ry, rx, ty, tx, py, px] → image row (ty·Py + py)·N + ry, column likewise
        image = (tiles.reshape(batch, n, n, ay.count, ax.count, ay.step, ax.step)
                 .transpose(0, 3, 5, 1, 4, 6, 2)
                 .reshape(batch, ay.count * ay.step * n, ax.count * ax.step * n))
        return xp.ascontiguousarray(image[:, : self.shape_out[0], : self.shape_out[1]])

    def _adjoint(self, images: Array) -> Array:
        # Correlation with g: irfft2(conj(Ĝ)·B̂) is, for real signals, the circular index
        # reversal of irfft2(Ĝ·conj(B̂)), summed here over the sensor phases r.
        be, xp = self.backend, self.backend.xp
        ay, ax = self._tiling
        grid = self.tile_grid_shape
        batch, pairs, n = images.shape[0], self.lenslet_pitch**2, self.lenslet_pitch
        freqs, inputs = self._spectra.shape[:2]
        count = ay.count * ax.count
        ny, nx = self.shape_out
        full = xp.zeros((batch, ay.count * ay.step * n, ax.count * ax.step * n),
                        dtype=self.dtype)
        full[:, :ny, :nx] = images
        tiles = xp.ascontiguousarray(
            full.reshape(batch, ay.count, ay.step, n, ax.count, ax.step, n)
            .transpose(0, 3, 6, 1, 4, 2, 5))  # (B, ry, rx, Ty, Tx, Py, Px)
        spectrum = be.rfft2(tiles.reshape(batch, pairs, ay.count, ax.count, ay.step, ax.step),
                            grid)
        stacked = xp.ascontiguousarray(
            spectrum.reshape(batch, pairs, count, freqs).transpose(3, 0, 2, 1))
        planes = self._mix_adjoint(stacked.reshape(freqs, batch * count, pairs))
        planes = xp.ascontiguousarray(
            planes.reshape(grid[0], -1, inputs, batch, ay.count, ax.count)
            .transpose(3, 2, 4, 5, 0, 1))
        tiles = be.irfft2_window(planes, grid, (ay.length, ax.length), reverse=True,
                                 overwrite=True)  # (B, Z·S, Ty, Tx, Ly, Lx)
        volume = self._merge(self._overlap_add(tiles).reshape(
            batch * self.n_planes, pairs, ay.span, ax.span))
        return volume.reshape(batch, *self.shape_in)

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
                           calibration=self.calibration, tiles_yx=self.tiles_yx)
        model._norm_cache.update(self._norm_cache)
        return model

    def __reduce__(self) -> tuple[Any, ...]:
        # Pickle the PSF, not the spectra (4× the bytes); the receiver rebuilds them.
        return (_rebuild, (self.psf, self.geometry, self.dtype.str,
                           self._norm_cache.get("value"), self.calibration, self.tiles_yx))


def _rebuild(psf: np.ndarray, geometry: Geometry, dtype: str, norm: float | None,
             calibration: dict[str, Any], tiles_yx: tuple[int, int] | None = None
             ) -> LensletPSF:
    model = LensletPSF(psf, geometry, dtype=dtype, calibration=calibration,
                       tiles_yx=tiles_yx)
    model._seed_norm(norm)
    return model


def _forward_mixing(spectra: np.ndarray, columns: np.ndarray, out: np.ndarray, lo: int,
                    hi: int) -> None:
    """``out[f, c, r] = Σ_i Ĝ[f, i, r] · U[f, i, c]`` for ``f`` in ``[lo, hi)`` (numba).

    `spectra` is (F, I, 2, R) real (real and imaginary rows), `columns` (F, I, 2C) and `out`
    (F, C, 2R) are complex arrays seen as real pairs. Each matrix row is read once per
    frequency and used for every column; the sum over ``i`` runs four rows at a time in one
    fixed order, so results do not depend on the thread split.
    """
    inputs, pairs = spectra.shape[1], spectra.shape[3]
    count = columns.shape[2] // 2
    acc = np.empty((count, 2, pairs), dtype=spectra.dtype)
    whole = inputs - inputs % 4
    for f in range(lo, hi):
        acc[...] = 0
        for c in range(count):
            are, aim = acc[c, 0], acc[c, 1]
            for i in range(0, whole, 4):
                g0r, g0i = spectra[f, i, 0], spectra[f, i, 1]
                g1r, g1i = spectra[f, i + 1, 0], spectra[f, i + 1, 1]
                g2r, g2i = spectra[f, i + 2, 0], spectra[f, i + 2, 1]
                g3r, g3i = spectra[f, i + 3, 0], spectra[f, i + 3, 1]
                u0r, u0i = columns[f, i, 2 * c], columns[f, i, 2 * c + 1]
                u1r, u1i = columns[f, i + 1, 2 * c], columns[f, i + 1, 2 * c + 1]
                u2r, u2i = columns[f, i + 2, 2 * c], columns[f, i + 2, 2 * c + 1]
                u3r, u3i = columns[f, i + 3, 2 * c], columns[f, i + 3, 2 * c + 1]
                for r in range(pairs):
                    are[r] += (g0r[r] * u0r - g0i[r] * u0i + g1r[r] * u1r - g1i[r] * u1i
                               + g2r[r] * u2r - g2i[r] * u2i + g3r[r] * u3r - g3i[r] * u3i)
                    aim[r] += (g0r[r] * u0i + g0i[r] * u0r + g1r[r] * u1i + g1i[r] * u1r
                               + g2r[r] * u2i + g2i[r] * u2r + g3r[r] * u3i + g3i[r] * u3r)
            for i in range(whole, inputs):
                gr, gi = spectra[f, i, 0], spectra[f, i, 1]
                ur, ui = columns[f, i, 2 * c], columns[f, i, 2 * c + 1]
                for r in range(pairs):
                    are[r] += gr[r] * ur - gi[r] * ui
                    aim[r] += gr[r] * ui + gi[r] * ur
        for c in range(count):
            for r in range(pairs):
                out[f, c, 2 * r] = acc[c, 0, r]
                out[f, c, 2 * r + 1] = acc[c, 1, r]


def _adjoint_mixing(spectra: np.ndarray, rows: np.ndarray, out: np.ndarray, lo: int,
                    hi: int) -> None:
    """``out[f, i, c] = Σ_r Ĝ[f, i, r] · conj(B[f, c, r])`` for ``f`` in ``[lo, hi)`` (numba).

    `spectra` as in :func:`_forward_mixing`; `rows` (F, C, 2R) and `out` (F, I, 2C) are
    complex arrays seen as real pairs. One dot product per (i, c) along the contiguous
    matrix row, each in one fixed order.
    """
    inputs, pairs = spectra.shape[1], spectra.shape[3]
    count = rows.shape[1]
    split = np.empty((count, 2, pairs), dtype=spectra.dtype)
    for f in range(lo, hi):
        for c in range(count):
            for r in range(pairs):
                split[c, 0, r] = rows[f, c, 2 * r]
                split[c, 1, r] = rows[f, c, 2 * r + 1]
        for i in range(inputs):
            gr, gi = spectra[f, i, 0], spectra[f, i, 1]
            for c in range(count):
                br, bi = split[c, 0], split[c, 1]
                re = np.float32(0.0)  # float64 where the arrays are
                im = np.float32(0.0)
                for r in range(pairs):
                    re += gr[r] * br[r] + gi[r] * bi[r]
                    im += gi[r] * br[r] - gr[r] * bi[r]
                out[f, i, 2 * c] = re
                out[f, i, 2 * c + 1] = im


@functools.cache
def _kernels() -> tuple[Any, Any]:
    """:func:`_forward_mixing` and :func:`_adjoint_mixing` compiled (on first use, then
    loaded from numba's cache next to this file). Reassociation lets the dot products
    vectorise; no nnan/ninf, so NaN and Inf propagate."""
    import numba

    jit = numba.njit(nogil=True, cache=True, error_model="numpy",
                     fastmath={"arcp", "contract", "afn", "nsz", "reassoc"})
    return jit(_forward_mixing), jit(_adjoint_mixing)

@dataclass(frozen=True)
class _Tiles:
    """Overlap-save cut of one lattice axis of ``Q`` lenslets (see the class Notes).

    Tile ``t`` gives the outputs ``[tP, tP + P)`` from the inputs ``[tP - σ, tP - σ + L)``
    (zero outside the lattice) by a circular convolution of length ``G``. The inputs lie in
    a zero-padded span of ``(count - 1)·P + L`` samples, input ``k`` at ``k + σ``.
    """

    count: int   # tiles
    step: int    # P: outputs per tile
    length: int  # L: inputs per tile
    shift: int   # σ
    grid: int    # G: FFT length

    @property
    def span(self) -> int:
        return (self.count - 1) * self.step + self.length

    def placement(self, q: int) -> tuple[slice, slice]:
        """The lattice inputs the tiles read, and where they sit in the span."""
        low, high = max(0, -self.shift), min(q, self.span - self.shift)
        return slice(low, high), slice(low + self.shift, high + self.shift)


#: Relative costs behind the choice of tiling, in ns measured on one loaded core (2 cores,
#: 32 MiB L3): one real lattice FFT point times log2 of its grid; one spectrum-matrix entry
#: (complex64) read from memory; one complex multiply-add of the compiled products. A
#: frequency's products take the longer of reading its matrix and the multiply-adds with
#: every tile's column. Only the ratios matter, and only for speed: every tiling is exact.
_FFT_POINT, _MATRIX_READ, _MULTIPLY_ADD = 0.2, 0.27, 0.21
#: At most this many tiles per axis are considered.
_MAX_TILES = 16


def _axis_tilings(q: int, low: int, high: int, whole_grid: int) -> list[_Tiles]:
    """The cuts of an axis of `q` lenslets with kernel taps from `low` to `high`: the whole
    axis (inputs and outputs on the same window, grid `whole_grid`), and overlap-save tiles
    of every distinct length whose inputs overlap by less than a tile."""
    import scipy.fft

    options = [_Tiles(1, q, q, 0, whole_grid)]
    overlap = high - low
    steps = {q}
    for count in range(2, min(q, _MAX_TILES) + 1):
        step = -(-q // count)
        if step in steps or -(-q // step) != count or step < overlap:
            continue
        steps.add(step)
        length = step + overlap
        options.append(_Tiles(count, step, length, high,
                              scipy.fft.next_fast_len(length, real=True)))
    return options


def _tiling_cost(y: _Tiles, x: _Tiles, inputs: int, pairs: int) -> float:
    """Model of the time of one forward + adjoint with tilings `y` and `x`: the lattice
    FFTs of every tile, reading the spectrum matrices once each way, and the products."""
    tiles = y.count * x.count
    points = y.grid * x.grid
    freqs = y.grid * (x.grid // 2 + 1)
    transforms = 2 * (inputs + pairs) * tiles * points * math.log2(max(points, 2))
    products = 2 * freqs * inputs * pairs
    return (_FFT_POINT * transforms
            + products * max(_MATRIX_READ, _MULTIPLY_ADD * tiles))
