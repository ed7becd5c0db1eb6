"""PSF stacks of simulated instruments: a lensless mask camera and a pupil-plane microscope.

Both benches follow one recipe per depth and wavelength: the point's field arrives at a thin
element (:class:`~volrecon.simulate.masks.PhaseMask`), is multiplied by its transmittance,
travels to the sensor by the band-limited angular spectrum method, and is recorded as
intensity integrated over each pixel. A plane of the returned stack is the fraction of a
unit-power isotropic emitter's light that lands on each sensor pixel.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft

from volrecon.backend import available_cores
from volrecon.errors import ConfigError, ShapeError, VolreconWarning
from volrecon.simulate.masks import PhaseMask, circular_aperture
from volrecon.simulate.propagation import _apply_transfer, angular_spectrum_transfer
from volrecon.simulate.sources import (
    _pupil_field,
    _pupil_path_um,
    _spherical_path_um,
    collection_efficiency,
    spherical_wave,
)

if TYPE_CHECKING:
    from volrecon._typing import ComplexArray, FloatArray
    from volrecon.models import PSFModel

__all__ = ["PSFStack", "emission_band", "lensless_psf_stack", "pupil_psf_stack"]


@dataclass(frozen=True, eq=False)
class PSFStack:
    """A simulated PSF stack with the sampling it was made on.

    Attributes
    ----------
    psf_zyx : ndarray of shape (Z, Y, X), float32, read-only
        Plane ``i``: expected fraction of a unit-power emitter at ``depths_um[i]`` recorded
        by each sensor pixel. A point at voxel ``(i, Y//2, X//2)`` gives this plane.
    depths_um : ndarray of shape (Z,), float64, read-only
        Depth of each plane, micrometres (see the function that made the stack).
    pixel_size_um : float
        Sensor pixel pitch, micrometres.
    sample_pixel_size_um : float or None
        One sensor pixel mapped into the sample (pitch over magnification), micrometres; None
        where the magnification changes with depth (the lensless camera).
    wavelengths_um : tuple of float
        Vacuum wavelengths averaged over.
    wavelength_weights : tuple of float
        Their weights, summing to 1.
    """

    psf_zyx: FloatArray
    depths_um: FloatArray
    pixel_size_um: float
    sample_pixel_size_um: float | None
    wavelengths_um: tuple[float, ...]
    wavelength_weights: tuple[float, ...]

    def __post_init__(self) -> None:
        psf = np.array(self.psf_zyx, dtype=np.float32)
        depths = np.array(self.depths_um, dtype=np.float64).reshape(-1)
        if psf.ndim != 3 or psf.shape[0] != depths.size:
            raise ShapeError(
                f"PSFStack psf_zyx {psf.shape} must be (Z, Y, X) with Z = {depths.size} depths")
        psf.setflags(write=False)
        depths.setflags(write=False)
        object.__setattr__(self, "psf_zyx", psf)
        object.__setattr__(self, "depths_um", depths)

    @property
    def n_planes(self) -> int:
        """Number of depth planes Z."""
        return int(self.psf_zyx.shape[0])

    @property
    def depth_step_um(self) -> float:
        """Spacing of the depths, micrometres (uniform spacing required; 1.0 for one plane)."""
        if self.n_planes == 1:
            return 1.0
        steps = np.diff(self.depths_um)
        if not np.allclose(steps, steps[0], rtol=1e-6, atol=1e-9) or steps[0] <= 0:
            raise ConfigError(
                "PSFStack depths_um are not evenly increasing; simulate evenly spaced depths "
                "to use the stack as a model")
        return float(steps[0])

    def to_model(self) -> PSFModel:
        """The shift-invariant volrecon model of this stack (used as given).

        Its lateral voxel size is `sample_pixel_size_um`, or the sensor pitch where that is
        None (the lensless camera, whose volume is then described on the sensor grid).
        """
        from volrecon.models import PSFModel

        pixel = self.sample_pixel_size_um or self.pixel_size_um
        return PSFModel.from_stack(self.psf_zyx, self.depth_step_um, pixel,
                                   float(self.depths_um[0]))


def emission_band(center_um: float, full_width_um: float, *, samples: int = 5
                  ) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Wavelengths and weights sampling a Gaussian emission band.

    Parameters
    ----------
    center_um : float
        Peak wavelength, micrometres.
    full_width_um : float
        Full width at half maximum, micrometres; 0 gives the single centre wavelength.
    samples : int
        Number of wavelengths, spread evenly over ± one FWHM.

    Returns
    -------
    wavelengths_um, weights : tuple of float
        Weights are the Gaussian spectrum at each wavelength, normalised to sum 1.
    """
    if not (math.isfinite(center_um) and center_um > 0):
        raise ConfigError(f"center_um must be a positive wavelength; got {center_um!r}")
    if not (math.isfinite(full_width_um) and 0 <= full_width_um < center_um):
        raise ConfigError(f"full_width_um must be in [0, center_um); got {full_width_um!r}")
    if full_width_um == 0 or samples == 1:
        return (float(center_um),), (1.0,)
    if samples < 1:
        raise ConfigError(f"samples must be at least 1; got {samples}")
    waves = center_um + np.linspace(-full_width_um, full_width_um, samples)
    sigma = full_width_um / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    weights = np.exp(-0.5 * ((waves - center_um) / sigma) ** 2)
    weights /= weights.sum()
    return tuple(float(w) for w in waves), tuple(float(w) for w in weights)


def _wavelengths(wavelength_um: float | Sequence[float],
                 wavelength_weights: Sequence[float] | None
                 ) -> tuple[tuple[float, ...], tuple[float, ...]]:
    waves = (wavelength_um,) if isinstance(wavelength_um, int | float) else tuple(wavelength_um)
    if not waves or not all(math.isfinite(w) and w > 0 for w in waves):
        raise ConfigError(f"wavelength_um must be positive wavelengths; got {wavelength_um!r}")
    if wavelength_weights is None:
        weights = np.full(len(waves), 1.0 / len(waves))
    else:
        weights = np.asarray(wavelength_weights, dtype=np.float64)
        if weights.shape != (len(waves),) or (weights < 0).any() or weights.sum() <= 0:
            raise ConfigError(
                f"wavelength_weights must be {len(waves)} non-negative numbers with a positive "
                f"sum; got {wavelength_weights!r}")
        weights = weights / weights.sum()
    return tuple(float(w) for w in waves), tuple(float(w) for w in weights)


def _depths(depths_um: Sequence[float] | FloatArray) -> FloatArray:
    depths = np.asarray(depths_um, dtype=np.float64).reshape(-1)
    if depths.size == 0 or not np.isfinite(depths).all():
        raise ConfigError(f"depths_um must be a non-empty list of finite depths; got {depths_um!r}")
    return depths


def _bin_factor(shape: tuple[int, int], bin_factor: int) -> int:
    if not (isinstance(bin_factor, int) and bin_factor >= 1):
        raise ConfigError(f"bin_factor must be a positive integer; got {bin_factor!r}")
    if shape[0] % bin_factor or shape[1] % bin_factor:
        raise ShapeError(
            f"mask grid {shape} is not divisible by bin_factor {bin_factor}; make the mask a "
            "whole number of sensor pixels across")
    return bin_factor


def _bin(intensity: FloatArray, factor: int) -> FloatArray:
    if factor == 1:
        return intensity
    *lead, ny, nx = intensity.shape
    binned: FloatArray = intensity.reshape(*lead, ny // factor, factor, nx // factor, factor).sum(
        axis=(-3, -1))
    return binned


def _check_sampling(path_um: FloatArray, amplitude: FloatArray, *, pixel_size_um: float,
                    wavelength_um: float, what: str) -> None:
    """Warn when the field's local spatial frequency exceeds the grid's Nyquist limit."""
    gy, gx = np.gradient(path_um, pixel_size_um)
    slope = np.sqrt(gy**2 + gx**2)[amplitude > 0]
    if slope.size == 0:
        return
    frequency = float(slope.max()) / wavelength_um
    nyquist = 0.5 / pixel_size_um
    if frequency > nyquist:
        warnings.warn(
            f"{what}: the field at the mask reaches {frequency:.3g} cycles/um, above the "
            f"grid's Nyquist limit {nyquist:.3g}; use a finer mask grid (bin_factor) or a "
            "smaller aperture", VolreconWarning, stacklevel=3)


def _record(fields: ComplexArray, transfer: ComplexArray, pixel_size_um: float, factor: int,
            workers: int) -> FloatArray:
    sensor = _apply_transfer(fields, transfer, workers)
    intensity = (sensor.real**2 + sensor.imag**2) * np.float32(pixel_size_um**2)
    return _bin(intensity, factor)


def _padded(shape: tuple[int, int]) -> tuple[int, int]:
    return (scipy.fft.next_fast_len(2 * shape[0]), scipy.fft.next_fast_len(2 * shape[1]))


def lensless_psf_stack(mask: PhaseMask, depths_um: Sequence[float] | FloatArray, *,
                       mask_to_sensor_um: float, aperture_radius_um: float,
                       wavelength_um: float | Sequence[float],
                       wavelength_weights: Sequence[float] | None = None,
                       refractive_index: float = 1.0, bin_factor: int = 1,
                       workers: int | None = None) -> PSFStack:
    """PSF stack of a lensless camera: point → aperture and mask → gap → sensor.

    Parameters
    ----------
    mask : PhaseMask
        The coding element (e.g. :func:`~volrecon.simulate.random_diffuser_mask`); its grid
        is the simulation grid, centred on the axis.
    depths_um : sequence of float
        Distance of each point source in front of the mask, micrometres (> 0).
    mask_to_sensor_um : float
        Gap between mask and sensor, micrometres.
    aperture_radius_um : float
        Radius of the clear aperture in the mask plane, micrometres.
    wavelength_um : float or sequence of float
        Vacuum wavelength(s), micrometres; several are averaged with `wavelength_weights`.
    wavelength_weights : sequence of float, optional
        Relative weights of the wavelengths (default equal); see :func:`emission_band`.
    refractive_index : float
        Index of the medium in front of and behind the mask.
    bin_factor : int
        Mask pixels per sensor pixel along each axis; intensity is summed over each bin.
    workers : int, optional
        FFT threads. Default: every available core.

    Returns
    -------
    PSFStack
        ``sample_pixel_size_um`` is None: a sensor pixel spans ``pitch · z / d`` in the
        sample at distance ``z``.

    Notes
    -----
    A point at distance ``z`` casts the mask's pattern onto the sensor magnified by
    ``(z + d) / z``; this change of scale with depth is what encodes depth.
    """
    depths = _depths(depths_um)
    if (depths <= 0).any():
        raise ConfigError("depths_um of a lensless camera are distances in front of the mask and "
                          f"must be positive; got {depths.tolist()}")
    waves, weights = _wavelengths(wavelength_um, wavelength_weights)
    factor = _bin_factor(mask.shape, bin_factor)
    workers = workers or available_cores()
    dx = mask.pixel_size_um
    aperture = circular_aperture(mask.shape, radius_um=aperture_radius_um, pixel_size_um=dx)
    grid = _padded(mask.shape)
    out = np.zeros((depths.size, mask.shape[0] // factor, mask.shape[1] // factor), np.float32)
    for wave, weight in zip(waves, weights, strict=True):
        transmit = mask.transmittance(wave) * aperture
        transfer = angular_spectrum_transfer(grid, mask_to_sensor_um, wavelength_um=wave,
                                             pixel_size_um=dx, refractive_index=refractive_index)
        for i, z in enumerate(depths):
            path = _spherical_path_um(mask.shape, distance_um=float(z), pixel_size_um=dx,
                                      lateral_offset_yx_um=(0.0, 0.0),
                                      refractive_index=refractive_index)
            _check_sampling(path + mask.optical_path_um, aperture * mask.amplitude,
                            pixel_size_um=dx, wavelength_um=wave,
                            what=f"lensless_psf_stack depth {z:g} um")
            field = spherical_wave(mask.shape, distance_um=float(z), wavelength_um=wave,
                                   pixel_size_um=dx, refractive_index=refractive_index)
            # A partly covered edge pixel passes the fraction f of the power but holds the
            # amplitude f (right for diffraction): rescale to the power the aperture passes.
            incident = np.abs(field).astype(np.float64) ** 2 * mask.amplitude**2
            held = float(np.sum(incident * aperture**2))
            scale = math.sqrt(float(np.sum(incident * aperture)) / held) if held > 0 else 1.0
            field *= transmit * np.float32(scale)
            out[i] += np.float32(weight) * _record(field, transfer, dx, factor, workers)
    return PSFStack(out, depths, dx * factor, None, waves, weights)


def pupil_psf_stack(mask: PhaseMask, depths_um: Sequence[float] | FloatArray, *,
                    numerical_aperture: float, pupil_radius_um: float,
                    pupil_to_sensor_um: float, wavelength_um: float | Sequence[float],
                    wavelength_weights: Sequence[float] | None = None,
                    immersion_index: float = 1.33,
                    lateral_offset_yx_um: tuple[float, float] = (0.0, 0.0),
                    bin_factor: int = 1, workers: int | None = None) -> PSFStack:
    """PSF stack of a microscope with a thin element in its pupil and a sensor behind it.

    With a :func:`~volrecon.simulate.microlens_array_mask` and the sensor in the lenslets'
    focal plane this is a Fourier light-field microscope; with a
    :func:`~volrecon.simulate.random_diffuser_mask` a diffuser microscope; with a
    :func:`~volrecon.simulate.thin_lens_mask` focused on the sensor a widefield one.

    Parameters
    ----------
    mask : PhaseMask
        Element in the pupil plane; its grid is the simulation grid, centred on the axis.
    depths_um : sequence of float
        Depth of each point below (positive) or above the focal plane, in the sample,
        micrometres.
    numerical_aperture : float
        Objective NA; must be below `immersion_index`.
    pupil_radius_um : float
        Radius of the pupil on the mask grid, micrometres.
    pupil_to_sensor_um : float
        Distance from the pupil element to the sensor, micrometres.
    wavelength_um : float or sequence of float
        Vacuum wavelength(s), micrometres.
    wavelength_weights : sequence of float, optional
        Relative weights (default equal); see :func:`emission_band`.
    immersion_index : float
        Refractive index of the sample medium.
    lateral_offset_yx_um : tuple of float
        Lateral position of the point in the sample, micrometres (a bead off the axis).
    bin_factor : int
        Mask pixels per sensor pixel along each axis.
    workers : int, optional
        FFT threads. Default: every available core.

    Returns
    -------
    PSFStack
        ``sample_pixel_size_um = pitch / M`` with magnification
        ``M = pupil_to_sensor_um · NA / pupil_radius_um``.

    Notes
    -----
    The pupil field is :func:`~volrecon.simulate.pupil_field`; between pupil and sensor the
    light travels in air by the band-limited angular spectrum method.
    """
    depths = _depths(depths_um)
    waves, weights = _wavelengths(wavelength_um, wavelength_weights)
    factor = _bin_factor(mask.shape, bin_factor)
    collection_efficiency(numerical_aperture, immersion_index)  # refuses NA >= n early
    workers = workers or available_cores()
    dx = mask.pixel_size_um
    grid = _padded(mask.shape)
    out = np.zeros((depths.size, mask.shape[0] // factor, mask.shape[1] // factor), np.float32)
    pupil = circular_aperture(mask.shape, radius_um=pupil_radius_um, pixel_size_um=dx)
    paths = np.stack([
        _pupil_path_um(mask.shape, depth_um=float(depth), numerical_aperture=numerical_aperture,
                       pupil_radius_um=pupil_radius_um, pixel_size_um=dx,
                       immersion_index=immersion_index,
                       lateral_offset_yx_um=lateral_offset_yx_um)
        for depth in depths])
    # The path is linear in depth, so its steepest slope is at the first or the last depth.
    for i in (0, depths.size - 1):
        _check_sampling(paths[i] + mask.optical_path_um, pupil * mask.amplitude,
                        pixel_size_um=dx, wavelength_um=min(waves),
                        what=f"pupil_psf_stack depth {depths[i]:g} um")
    efficiency = collection_efficiency(numerical_aperture, immersion_index)
    for wave, weight in zip(waves, weights, strict=True):
        transmit = mask.transmittance(wave)
        transfer = angular_spectrum_transfer(grid, pupil_to_sensor_um, wavelength_um=wave,
                                             pixel_size_um=dx)
        fields = np.stack([_pupil_field(pupil, path, wavelength_um=wave, efficiency=efficiency,
                                        pixel_size_um=dx) for path in paths])
        fields *= transmit
        out += np.float32(weight) * _record(fields, transfer, dx, factor, workers)
    magnification = pupil_to_sensor_um * numerical_aperture / pupil_radius_um
    return PSFStack(out, depths, dx * factor, dx * factor / magnification, waves, weights)
