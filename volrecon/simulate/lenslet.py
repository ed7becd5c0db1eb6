"""PSF stacks of a light-field microscope with its microlens array at the native image plane.

The instrument: an objective and tube lens image the sample onto a square array of microlenses
at magnification ``M``; the sensor sits one lenslet focal length behind the array, and every
lenslet covers ``N × N`` sensor pixels. Per depth, wavelength and point the simulation follows
scalar Fourier optics [1]_:

1. the field the point makes at the native image plane, the Fourier transform of the
   objective's pupil carrying the point's defocus and position (coherent imaging, [1]_ ch. 6);
2. multiplied by the lenslets' paraxial thin-lens phase ``exp(-i k r² / (2 f))`` ([1]_ ch. 5),
   ``r`` measured from the centre of the lenslet the pixel lies under;
3. carried over the focal length ``f`` by the band-limited angular spectrum method [2]_
   (:func:`~volrecon.simulate.propagate`), and recorded as intensity summed over each pixel.

References
----------
.. [1] J. W. Goodman, *Introduction to Fourier Optics*, 3rd ed., Roberts & Co. (2005).
.. [2] K. Matsushima, T. Shimobaba, "Band-limited angular spectrum method for numerical
   simulation of free-space propagation in far and near fields", Opt. Express 17, 19662
   (2009).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft

from volrecon.backend import available_cores
from volrecon.errors import ConfigError, ShapeError
from volrecon.simulate.masks import PhaseMask, circular_aperture
from volrecon.simulate.propagation import propagate
from volrecon.simulate.psf import emission_band
from volrecon.simulate.sources import collection_efficiency

if TYPE_CHECKING:
    from collections.abc import Sequence

    from volrecon._typing import ComplexArray, FloatArray
    from volrecon.models import PSFModel

__all__ = ["LensletDesign", "LensletPSFStack", "lenslet_point_images", "lenslet_psf_stack"]


@dataclass(frozen=True)
class LensletDesign:
    """A light-field microscope: objective → microlens array at the image plane → sensor.

    The defaults: a 20×/0.5 water-immersion objective, 6.5 µm pixels (0.325 µm in the sample),
    5 × 5 pixels per lenslet (32.5 µm pitch), the lenslets' f-number matched to the image-side
    NA so that each lenslet images the pupil onto its own pixel block, and a 60 × 60 sensor
    (12 × 12 lenslets, 19.5 µm of sample).

    Attributes
    ----------
    shape_yx : tuple of int
        Sensor pixels (Y, X).
    lenslet_pitch : int
        Sensor pixels per lenslet along each axis, ``N``. Lenslet ``(k, l)`` covers pixels
        ``[kN, kN + N) × [lN, lN + N)``.
    sensor_pixel_um : float
        Sensor pixel pitch, micrometres.
    magnification : float
        Objective-to-image-plane magnification ``M``.
    numerical_aperture : float
        Objective NA; must be below `immersion_index`.
    immersion_index : float
        Sample medium index (1.33: water or a hydrogel).
    lenslet_focal_length_um : float or None
        Lenslet focal length, micrometres. None (default): f-number matched,
        ``f = N · pixel · M / (2 NA)``.
    wavelength_um, bandwidth_um : float
        Emission peak and full width at half maximum, micrometres.
    wavelength_samples : int
        Wavelengths averaged across the band.
    oversample : int
        Simulation grid points per sensor pixel along each axis.
    """

    shape_yx: tuple[int, int] = (60, 60)
    lenslet_pitch: int = 5
    sensor_pixel_um: float = 6.5
    magnification: float = 20.0
    numerical_aperture: float = 0.5
    immersion_index: float = 1.33
    lenslet_focal_length_um: float | None = None
    wavelength_um: float = 0.52
    bandwidth_um: float = 0.03
    wavelength_samples: int = 3
    oversample: int = 2

    def __post_init__(self) -> None:
        for name in ("sensor_pixel_um", "magnification", "numerical_aperture",
                     "immersion_index", "wavelength_um"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ConfigError(f"LensletDesign {name} must be positive; got {value!r}")
        for name in ("lenslet_pitch", "oversample", "wavelength_samples"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ConfigError(
                    f"LensletDesign {name} must be a positive integer; got {value!r}")
        focal = self.lenslet_focal_length_um
        if focal is not None and not (math.isfinite(focal) and focal > 0):
            raise ConfigError(
                f"LensletDesign lenslet_focal_length_um must be positive or None; got {focal!r}")
        collection_efficiency(self.numerical_aperture, self.immersion_index)  # NA < n
        shape = (int(self.shape_yx[0]), int(self.shape_yx[1]))
        if min(shape) < self.lenslet_pitch:
            raise ShapeError(f"LensletDesign shape_yx {shape} must be at least one lenslet "
                             f"({self.lenslet_pitch} pixels) across")
        object.__setattr__(self, "shape_yx", shape)

    @property
    def pitch_um(self) -> float:
        """Lenslet pitch at the image plane, micrometres."""
        return self.lenslet_pitch * self.sensor_pixel_um

    @property
    def focal_length_um(self) -> float:
        """Lenslet focal length, micrometres (the chosen or the f-number-matched one)."""
        if self.lenslet_focal_length_um is not None:
            return float(self.lenslet_focal_length_um)
        return self.pitch_um * self.magnification / (2.0 * self.numerical_aperture)

    @property
    def sample_pixel_size_um(self) -> float:
        """One sensor pixel in the sample, micrometres (the model's voxel width)."""
        return self.sensor_pixel_um / self.magnification

    @property
    def block_origin_yx(self) -> tuple[int, int]:
        """First pixel of the lenslet holding the sensor centre, ``N·((Y//2)//N)`` per axis."""
        n = self.lenslet_pitch
        return (n * ((self.shape_yx[0] // 2) // n), n * ((self.shape_yx[1] // 2) // n))

    def grid_pixel_um(self) -> float:
        """Spacing of the simulation grid at the image plane, micrometres."""
        return self.sensor_pixel_um / self.oversample

    def depths_um(self, n_planes: int, depth_step_um: float) -> FloatArray:
        """`n_planes` depths `depth_step_um` apart, centred on the focal plane."""
        if not (isinstance(n_planes, int) and n_planes >= 1):
            raise ConfigError(f"n_planes must be a positive integer; got {n_planes!r}")
        if not (math.isfinite(depth_step_um) and depth_step_um > 0):
            raise ConfigError(f"depth_step_um must be positive; got {depth_step_um!r}")
        return (np.arange(n_planes) - (n_planes - 1) / 2.0) * depth_step_um

    def lenslet_mask(self, shape_yx: tuple[int, int], origin_yx: tuple[int, int] = (0, 0)
                     ) -> PhaseMask:
        """The microlens array on a simulation grid: optical path ``-|r - c|² / (2 f)``.

        Parameters
        ----------
        shape_yx : tuple of int
            Grid size, in simulation pixels (``oversample`` per sensor pixel).
        origin_yx : tuple of int
            Grid index of the sensor's first pixel corner: cells are ``N · oversample`` grid
            pixels wide and start there, so lenslet ``(k, l)`` covers sensor pixels
            ``[kN, kN + N) × [lN, lN + N)``. The array extends over the whole grid.

        Returns
        -------
        PhaseMask
            Unit amplitude; ``c`` is the centre of the cell the grid pixel's centre lies in.
        """
        cell = self.lenslet_pitch * self.oversample
        dx = self.grid_pixel_um()
        local = [((np.arange(size) - start) % cell + 0.5) * dx - self.pitch_um / 2.0
                 for size, start in zip(shape_yx, origin_yx, strict=True)]
        opd = -(local[0][:, None] ** 2 + local[1][None, :] ** 2) / (2.0 * self.focal_length_um)
        return PhaseMask(opd, np.ones(opd.shape, np.float32), dx)


@dataclass(frozen=True, eq=False)
class LensletPSFStack:
    """A simulated (Z, N, N, Y, X) stack of a :class:`LensletDesign`.

    Attributes
    ----------
    psf : ndarray of shape (Z, N, N, Y, X), float32, read-only
        ``psf[z, i, j]``: expected fraction of a unit-power emitter at depth
        ``depths_um[z]`` and voxel ``(y0 + i, x0 + j)`` recorded by each pixel, with
        ``(y0, x0)`` = :attr:`LensletDesign.block_origin_yx` (the model's convention).
    depths_um : ndarray of shape (Z,), float64, read-only
        Depth of each plane below (positive) or above the focal plane, micrometres.
    design : LensletDesign
        The instrument.
    """

    psf: FloatArray
    depths_um: FloatArray
    design: LensletDesign

    def __post_init__(self) -> None:
        psf = np.array(self.psf, dtype=np.float32)
        depths = np.array(self.depths_um, dtype=np.float64).reshape(-1)
        n = self.design.lenslet_pitch
        if psf.shape != (depths.size, n, n, *self.design.shape_yx):
            raise ShapeError(f"LensletPSFStack psf {psf.shape} must be (Z, {n}, {n}, "
                             f"{self.design.shape_yx[0]}, {self.design.shape_yx[1]}) with "
                             f"Z = {depths.size} depths")
        psf.setflags(write=False)
        depths.setflags(write=False)
        object.__setattr__(self, "psf", psf)
        object.__setattr__(self, "depths_um", depths)

    @property
    def depth_step_um(self) -> float:
        """Spacing of the depths, micrometres (1.0 for one plane)."""
        if self.depths_um.size == 1:
            return 1.0
        steps = np.diff(self.depths_um)
        if not np.allclose(steps, steps[0], rtol=1e-6, atol=1e-9) or steps[0] <= 0:
            raise ConfigError("LensletPSFStack depths_um are not evenly increasing; simulate "
                              "evenly spaced depths to use the stack as a model")
        return float(steps[0])

    def to_model(self) -> PSFModel:
        """The periodically shift-variant volrecon model of this stack (used as given)."""
        from volrecon.models import PSFModel

        return PSFModel.from_stack(self.psf, self.depth_step_um,
                                   self.design.sample_pixel_size_um, float(self.depths_um[0]),
                                   lenslet_pitch=self.design.lenslet_pitch)


def _image_plane_fields(design: LensletDesign, depth_um: float, positions_yx_px: FloatArray,
                        *, wavelength_um: float, grid: tuple[int, int],
                        origin: tuple[int, int], workers: int) -> ComplexArray:
    """Fields (K, Gy, Gx) at the array of unit-power points at `positions_yx_px` (sensor px).

    The image-side pupil is a disc of radius ``NA / (M λ)`` in spatial frequency; a frequency
    ``ν`` of the image plane is the sample-side transverse frequency ``M ν``, so a point
    ``δz`` deep adds the angular-spectrum defocus ``k δz (sqrt(n² - (M λ |ν|)²) - n)``
    ([1]_ §3.10, piston removed) and its image position ``s`` the ramp ``exp(-2πi ν · s)``.
    """
    dx = design.grid_pixel_um()
    cutoff = design.numerical_aperture / (design.magnification * wavelength_um)
    df = (1.0 / (grid[0] * dx), 1.0 / (grid[1] * dx))
    # A disc on the centred frequency grid (edge samples weighted by their covered fraction).
    if not math.isclose(df[0], df[1]):
        raise ShapeError(f"simulation grid {grid} must be square")
    pupil = scipy.fft.ifftshift(circular_aperture(grid, radius_um=cutoff, pixel_size_um=df[0]))
    fy = scipy.fft.fftfreq(grid[0], d=dx)[:, None]
    fx = scipy.fft.fftfreq(grid[1], d=dx)[None, :]
    sample_sin = np.minimum(design.magnification * wavelength_um * np.sqrt(fy**2 + fx**2),
                            design.numerical_aperture)
    n = design.immersion_index
    defocus = (2.0 * np.pi / wavelength_um) * depth_um * (np.sqrt(n**2 - sample_sin**2) - n)
    pupil_field = pupil * np.exp(1j * defocus)
    # Grid index q sits at (q - origin + 0.5) dx from the sensor corner; the point's image
    # at (p + 0.5) · pixel for sensor coordinate p.
    positions = np.asarray(positions_yx_px, dtype=np.float64).reshape(-1, 2)
    shift_y = (positions[:, 0] + 0.5) * design.sensor_pixel_um - (0.5 - origin[0]) * dx
    shift_x = (positions[:, 1] + 0.5) * design.sensor_pixel_um - (0.5 - origin[1]) * dx
    ramps = (np.exp(-2j * np.pi * fy[None] * shift_y[:, None, None])
             * np.exp(-2j * np.pi * fx[None] * shift_x[:, None, None]))
    fields = scipy.fft.ifft2(pupil_field[None] * ramps, workers=workers)
    efficiency = collection_efficiency(design.numerical_aperture, n)
    power = float(np.sum(np.abs(fields[0]) ** 2)) * dx * dx
    scale = math.sqrt(efficiency / power) if power > 0 else 0.0
    out: ComplexArray = (fields * scale).astype(np.complex64)
    return out


def lenslet_point_images(design: LensletDesign, depths_um: Sequence[float] | FloatArray,
                         positions_yx_px: Sequence[tuple[float, float]] | FloatArray, *,
                         workers: int | None = None) -> FloatArray:
    """Sensor images of points at the given depths and sensor-grid positions.

    Parameters
    ----------
    design : LensletDesign
        The instrument.
    depths_um : sequence of float
        Depth of each plane below (positive) or above the focal plane, micrometres.
    positions_yx_px : sequence of (y, x)
        Lateral positions on the volume's grid (the sensor pixel grid mapped into the
        sample), in pixels; ``(p, q)`` is the voxel whose image falls on pixel ``(p, q)``.
        Fractions are allowed.

    workers : int, optional
        FFT threads. Default: every available core.

    Returns
    -------
    ndarray of shape (Z, K, Y, X), float32
        Expected fraction of a unit-power isotropic emitter's light recorded by each pixel.

    Notes
    -----
    The simulation grid is twice the sensor (times ``oversample``) with the sensor in its
    middle, so light of points near the edge does not wrap round; the lenslet array covers
    the whole grid. The in-focus image of a point is an Airy disc of diameter
    ``2.44 λ M / NA`` at the array; each lenslet then forms its focal-plane image. The
    objective's apodisation and the vectorial nature of light are neglected.
    """
    depths = np.asarray(depths_um, dtype=np.float64).reshape(-1)
    if depths.size == 0 or not np.isfinite(depths).all():
        raise ConfigError(f"depths_um must be a non-empty list of finite depths; got {depths_um!r}")
    positions = np.asarray(positions_yx_px, dtype=np.float64).reshape(-1, 2)
    if not np.isfinite(positions).all():
        raise ConfigError("positions_yx_px must be finite (y, x) pixel positions")
    workers = workers or available_cores()
    os_ = design.oversample
    window = (design.shape_yx[0] * os_, design.shape_yx[1] * os_)
    side = scipy.fft.next_fast_len(2 * max(window))
    grid = (side, side)
    origin = ((side - window[0]) // 2, (side - window[1]) // 2)
    dx = design.grid_pixel_um()
    waves, weights = emission_band(design.wavelength_um, design.bandwidth_um,
                                   samples=design.wavelength_samples)
    mask = design.lenslet_mask(grid, origin)
    out = np.zeros((depths.size, positions.shape[0], *design.shape_yx), np.float32)
    for wave, weight in zip(waves, weights, strict=True):
        transmit = mask.transmittance(wave)
        for z, depth in enumerate(depths):
            fields = _image_plane_fields(design, float(depth), positions, wavelength_um=wave,
                                         grid=grid, origin=origin, workers=workers)
            fields *= transmit
            sensor = propagate(fields, design.focal_length_um, wavelength_um=wave,
                               pixel_size_um=dx, pad=False, workers=workers)
            window_field = sensor[:, origin[0]:origin[0] + window[0],
                                  origin[1]:origin[1] + window[1]]
            intensity = (window_field.real**2 + window_field.imag**2) * np.float32(dx * dx)
            binned = intensity.reshape(positions.shape[0], design.shape_yx[0], os_,
                                       design.shape_yx[1], os_).sum(axis=(2, 4))
            out[z] += np.float32(weight) * binned
    return out


def lenslet_psf_stack(design: LensletDesign, depths_um: Sequence[float] | FloatArray, *,
                      workers: int | None = None) -> LensletPSFStack:
    """The (Z, N, N, Y, X) PSF stack of `design`: every sub-position of the central lenslet.

    Parameters
    ----------
    design : LensletDesign
        The instrument.
    depths_um : sequence of float
        Depths, micrometres; evenly spaced for :meth:`LensletPSFStack.to_model`.
    workers : int, optional
        FFT threads. Default: every available core.

    Returns
    -------
    LensletPSFStack
        ``psf[z, i, j]`` is :func:`lenslet_point_images` of voxel ``(y0 + i, x0 + j)``.

    Examples
    --------
    >>> design = LensletDesign(shape_yx=(20, 20), lenslet_pitch=4, wavelength_samples=1)
    >>> stack = lenslet_psf_stack(design, [-2.0, 0.0, 2.0])
    >>> stack.psf.shape
    (3, 4, 4, 20, 20)
    >>> model = stack.to_model()
    >>> model.kind, model.lenslet_pitch
    ('lenslet', 4)
    """
    n = design.lenslet_pitch
    y0, x0 = design.block_origin_yx
    positions = [(y0 + i, x0 + j) for i in range(n) for j in range(n)]
    images = lenslet_point_images(design, depths_um, positions, workers=workers)
    depths = np.asarray(depths_um, dtype=np.float64).reshape(-1)
    return LensletPSFStack(images.reshape(depths.size, n, n, *design.shape_yx), depths, design)
