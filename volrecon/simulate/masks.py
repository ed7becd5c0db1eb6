"""Thin optical elements as optical-path maps: apertures, lenses, microlens arrays, diffusers.

Every element is a :class:`PhaseMask`: an amplitude map and an optical path difference (OPD,
micrometres) on a square grid. Its complex transmittance at vacuum wavelength ``λ`` is
``amplitude · exp(i 2π OPD / λ)``, so one mask serves every wavelength of a band (dispersion
of the material is neglected). Coordinates follow the volrecon centre convention: the optical
axis passes through pixel ``(Y//2, X//2)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft

from volrecon.errors import ConfigError, ShapeError

if TYPE_CHECKING:
    from volrecon._typing import ComplexArray, FloatArray, RNGLike

__all__ = [
    "PhaseMask",
    "circular_aperture",
    "grid_coordinates",
    "microlens_array_mask",
    "random_diffuser_mask",
    "thin_lens_mask",
]


def _positive(name: str, value: float) -> float:
    if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
        raise ConfigError(f"{name} must be a positive finite number; got {value!r}")
    return float(value)


def _shape(shape_yx: tuple[int, int]) -> tuple[int, int]:
    if len(shape_yx) != 2 or min(shape_yx) < 1:
        raise ShapeError(f"shape_yx must be two positive sizes (Y, X); got {shape_yx!r}")
    return int(shape_yx[0]), int(shape_yx[1])


def grid_coordinates(shape_yx: tuple[int, int], pixel_size_um: float
                     ) -> tuple[FloatArray, FloatArray]:
    """Pixel-centre coordinates in micrometres, zero at pixel ``(Y//2, X//2)``.

    Returns
    -------
    y, x : ndarray of shape (Y, 1) and (1, X), float64
        Broadcastable coordinate columns/rows.
    """
    ny, nx = _shape(shape_yx)
    dx = _positive("pixel_size_um", pixel_size_um)
    y = (np.arange(ny) - ny // 2)[:, None] * dx
    x = (np.arange(nx) - nx // 2)[None, :] * dx
    return y.astype(np.float64), x.astype(np.float64)


def circular_aperture(shape_yx: tuple[int, int], *, radius_um: float, pixel_size_um: float,
                      center_yx_um: tuple[float, float] = (0.0, 0.0),
                      supersample: int = 8) -> FloatArray:
    """Transmission of a clear disc, each pixel weighted by the fraction of it inside.

    Parameters
    ----------
    shape_yx : tuple of int
        Grid size.
    radius_um : float
        Disc radius, micrometres.
    pixel_size_um : float
        Grid spacing, micrometres.
    center_yx_um : tuple of float
        Disc centre relative to the optical axis, micrometres.
    supersample : int
        Sub-samples per pixel and axis used to estimate the covered fraction.

    Returns
    -------
    ndarray of shape `shape_yx`, float32
        Values in [0, 1]; their sum times the pixel area approximates ``π r²``.
    """
    radius = _positive("radius_um", radius_um)
    if supersample < 1:
        raise ConfigError(f"supersample must be at least 1; got {supersample}")
    y, x = grid_coordinates(shape_yx, pixel_size_um)
    offsets = ((np.arange(supersample) + 0.5) / supersample - 0.5) * pixel_size_um
    y = y - center_yx_um[0]
    x = x - center_yx_um[1]
    coverage = np.zeros(_shape(shape_yx), dtype=np.float64)
    for oy in offsets:
        inside_y = (y + oy) ** 2
        for ox in offsets:
            coverage += (inside_y + (x + ox) ** 2) <= radius**2
    return (coverage / supersample**2).astype(np.float32)


@dataclass(frozen=True, eq=False)
class PhaseMask:
    """A thin element: amplitude transmission and optical path difference on a grid.

    Attributes
    ----------
    optical_path_um : ndarray of shape (Y, X), float32
        Optical path difference ``Δn · height`` added by the element, micrometres.
    amplitude : ndarray of shape (Y, X), float32
        Amplitude transmission in [0, 1].
    pixel_size_um : float
        Grid spacing, micrometres.

    Notes
    -----
    Masks compose by multiplication: ``a * b`` adds the optical paths and multiplies the
    amplitudes, i.e. two thin elements in contact.
    """

    optical_path_um: FloatArray
    amplitude: FloatArray
    pixel_size_um: float

    def __post_init__(self) -> None:
        opd = np.array(self.optical_path_um, dtype=np.float32)
        amp = np.array(self.amplitude, dtype=np.float32)
        if opd.ndim != 2 or opd.shape != amp.shape:
            raise ShapeError(
                f"PhaseMask optical_path_um {opd.shape} and amplitude {amp.shape} must be the "
                "same 2-D shape (Y, X)")
        if not (np.isfinite(opd).all() and np.isfinite(amp).all()):
            raise ConfigError("PhaseMask maps contain NaN or Inf; build them from finite values")
        _positive("pixel_size_um", self.pixel_size_um)
        opd.setflags(write=False)
        amp.setflags(write=False)
        object.__setattr__(self, "optical_path_um", opd)
        object.__setattr__(self, "amplitude", amp)
        object.__setattr__(self, "pixel_size_um", float(self.pixel_size_um))

    @property
    def shape(self) -> tuple[int, int]:
        """Grid size (Y, X)."""
        ny, nx = self.optical_path_um.shape
        return int(ny), int(nx)

    def transmittance(self, wavelength_um: float) -> ComplexArray:
        """Complex transmission ``amplitude · exp(i 2π OPD / λ)`` at a vacuum wavelength."""
        wavelength = _positive("wavelength_um", wavelength_um)
        phase = (2.0 * np.pi / wavelength) * self.optical_path_um.astype(np.float64)
        out: ComplexArray = (self.amplitude * np.exp(1j * phase)).astype(np.complex64)
        return out

    def __mul__(self, other: PhaseMask) -> PhaseMask:
        if not isinstance(other, PhaseMask):
            return NotImplemented
        if other.shape != self.shape or other.pixel_size_um != self.pixel_size_um:
            raise ShapeError(
                f"cannot combine masks of shape {self.shape} at {self.pixel_size_um} um and "
                f"{other.shape} at {other.pixel_size_um} um; build both on the same grid")
        return PhaseMask(self.optical_path_um + other.optical_path_um,
                         self.amplitude * other.amplitude, self.pixel_size_um)

    @classmethod
    def clear(cls, shape_yx: tuple[int, int], *, pixel_size_um: float) -> PhaseMask:
        """An element that changes nothing (unit amplitude, zero path)."""
        shape = _shape(shape_yx)
        return cls(np.zeros(shape, np.float32), np.ones(shape, np.float32), pixel_size_um)


def thin_lens_mask(shape_yx: tuple[int, int], *, focal_length_um: float, pixel_size_um: float,
                   radius_um: float | None = None) -> PhaseMask:
    """Paraxial thin lens: optical path ``-r² / (2 f)``, optionally with a circular aperture.

    Parameters
    ----------
    shape_yx : tuple of int
        Grid size.
    focal_length_um : float
        Focal length, micrometres (positive: converging).
    pixel_size_um : float
        Grid spacing, micrometres.
    radius_um : float, optional
        Clear aperture radius, micrometres. Default: no aperture.

    Notes
    -----
    The transmittance ``exp(-i k r² / (2 f))`` is the paraxial thin-lens phase of Goodman,
    *Introduction to Fourier Optics*, ch. 5. It is sampled without aliasing when
    ``r_max / (λ f) < 1 / (2 Δx)``.
    """
    focal = _positive("focal_length_um", focal_length_um)
    y, x = grid_coordinates(shape_yx, pixel_size_um)
    opd = -(y**2 + x**2) / (2.0 * focal)
    amplitude = (np.ones(_shape(shape_yx), np.float32) if radius_um is None else
                 circular_aperture(shape_yx, radius_um=radius_um, pixel_size_um=pixel_size_um))
    return PhaseMask(opd, amplitude, pixel_size_um)


def microlens_array_mask(shape_yx: tuple[int, int], *, pitch_um: float, focal_length_um: float,
                         pixel_size_um: float, layout: str = "hexagonal",
                         radius_um: float | None = None) -> PhaseMask:
    """Array of identical paraxial lenslets filling the grid, one centred on the axis.

    Parameters
    ----------
    shape_yx : tuple of int
        Grid size.
    pitch_um : float
        Distance between neighbouring lenslet centres, micrometres.
    focal_length_um : float
        Lenslet focal length, micrometres.
    pixel_size_um : float
        Grid spacing, micrometres.
    layout : {"hexagonal", "square"}
        Lattice of lenslet centres; each pixel belongs to the nearest centre, so cells are
        hexagons or squares with no dead area.
    radius_um : float, optional
        Outer circular aperture of the array, micrometres. Default: none.

    Returns
    -------
    PhaseMask
        Optical path ``-|r - c|² / (2 f)`` with ``c`` the pixel's lenslet centre.
    """
    pitch = _positive("pitch_um", pitch_um)
    focal = _positive("focal_length_um", focal_length_um)
    y, x = grid_coordinates(shape_yx, pixel_size_um)
    yy, xx = np.broadcast_arrays(y, x)
    cy: FloatArray
    cx: FloatArray
    if layout == "square":
        cy = np.round(yy / pitch) * pitch
        cx = np.round(xx / pitch) * pitch
    elif layout == "hexagonal":
        cy, cx = _nearest_hexagonal_centre(yy, xx, pitch)
    else:
        raise ConfigError(f"layout must be 'hexagonal' or 'square'; got {layout!r}")
    opd = -((yy - cy) ** 2 + (xx - cx) ** 2) / (2.0 * focal)
    amplitude = (np.ones(_shape(shape_yx), np.float32) if radius_um is None else
                 circular_aperture(shape_yx, radius_um=radius_um, pixel_size_um=pixel_size_um))
    return PhaseMask(opd, amplitude, pixel_size_um)


def _nearest_hexagonal_centre(y: FloatArray, x: FloatArray, pitch: float
                              ) -> tuple[FloatArray, FloatArray]:
    """Nearest point of a hexagonal lattice (rows along x, one point at the origin)."""
    row_step = pitch * math.sqrt(3.0) / 2.0
    best_d2 = np.full(y.shape, np.inf)
    best_y = np.zeros(y.shape)
    best_x = np.zeros(y.shape)
    base_row = np.floor(y / row_step)
    for drow in (0.0, 1.0):
        row = base_row + drow
        shift = np.where(np.mod(row, 2.0) == 0.0, 0.0, pitch / 2.0)
        cy = row * row_step
        cx = np.round((x - shift) / pitch) * pitch + shift
        d2 = (y - cy) ** 2 + (x - cx) ** 2
        closer = d2 < best_d2
        best_d2 = np.where(closer, d2, best_d2)
        best_y = np.where(closer, cy, best_y)
        best_x = np.where(closer, cx, best_x)
    return best_y, best_x


def random_diffuser_mask(shape_yx: tuple[int, int], *, pixel_size_um: float,
                         correlation_length_um: float, height_rms_um: float,
                         index_step: float, rng: RNGLike = None) -> PhaseMask:
    """A smooth random surface: Gaussian-correlated heights times a refractive-index step.

    Parameters
    ----------
    shape_yx : tuple of int
        Grid size.
    pixel_size_um : float
        Grid spacing, micrometres.
    correlation_length_um : float
        ``ℓ`` in the height autocorrelation ``C(r) = σ² exp(-r² / ℓ²)``, micrometres.
    height_rms_um : float
        Root-mean-square surface height ``σ``, micrometres.
    index_step : float
        Refractive-index difference across the surface (e.g. 0.5 for a polymer in air).
    rng : numpy Generator, int or None
        Source of randomness.

    Returns
    -------
    PhaseMask
        Optical path ``index_step · h`` with unit amplitude.

    Notes
    -----
    White Gaussian noise is filtered in the Fourier domain with ``exp(-π² ℓ² f² / 2)``, whose
    squared modulus is the Fourier transform of ``exp(-r² / ℓ²)``; the result is periodic on
    the grid and rescaled to zero mean and exactly ``σ`` root-mean-square. Random
    lenslet-like bumps of size ``ℓ`` focus light into caustics about
    ``ℓ² / (c · index_step · σ)`` behind the surface (``c`` of order 4–6).
    """
    shape = _shape(shape_yx)
    dx = _positive("pixel_size_um", pixel_size_um)
    length = _positive("correlation_length_um", correlation_length_um)
    sigma = _positive("height_rms_um", height_rms_um)
    step = _positive("index_step", index_step)
    generator = np.random.default_rng(rng)
    noise = generator.standard_normal(shape)
    fy = scipy.fft.fftfreq(shape[0], d=dx)[:, None]
    fx = scipy.fft.fftfreq(shape[1], d=dx)[None, :]
    filt = np.exp(-(np.pi**2) * length**2 * (fy**2 + fx**2) / 2.0)
    height = scipy.fft.ifft2(scipy.fft.fft2(noise) * filt).real
    height -= height.mean()
    height *= sigma / height.std()
    return PhaseMask(step * height, np.ones(shape, np.float32), dx)
