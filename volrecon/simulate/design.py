"""Ready-made instrument designs: a diffuser, a Fourier light-field and a widefield microscope."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.errors import ConfigError
from volrecon.simulate.masks import (
    PhaseMask,
    microlens_array_mask,
    random_diffuser_mask,
    thin_lens_mask,
)
from volrecon.simulate.psf import PSFStack, emission_band, pupil_psf_stack

if TYPE_CHECKING:
    from collections.abc import Sequence

    from volrecon._typing import FloatArray

__all__ = ["KINDS", "MicroscopeDesign"]

#: Pupil elements a :class:`MicroscopeDesign` can carry.
KINDS = ("diffuser", "lightfield", "widefield")


@dataclass(frozen=True)
class MicroscopeDesign:
    """A single-shot 3-D microscope: objective, thin element in the pupil, bare sensor.

    The defaults give a compact water-immersion instrument whose 128 × 128 sensor of 4 µm
    pixels sees 128 µm of sample (magnification 4, 1 µm per pixel) over about 30 µm of depth.

    Attributes
    ----------
    kind : {"diffuser", "lightfield", "widefield"}
        Pupil element: a random diffuser, a hexagonal microlens array focused on the sensor
        (Fourier light field), or a single lens focused on the sensor.
    shape_yx : tuple of int
        Sensor pixels (Y, X).
    sensor_pixel_um : float
        Sensor pixel pitch, micrometres.
    numerical_aperture : float
        Objective NA.
    immersion_index : float
        Sample medium index (1.33: water or hydrogel).
    pupil_radius_um : float
        Pupil radius at the element, micrometres.
    pupil_to_sensor_um : float
        Element-to-sensor distance, micrometres (the lenslets' / lens's focal length).
    wavelength_um, bandwidth_um : float
        Emission peak and full width at half maximum, micrometres.
    wavelength_samples : int
        Wavelengths averaged across the band.
    diffuser_correlation_um, diffuser_height_rms_um, diffuser_index_step : float
        Diffuser surface (see :func:`~volrecon.simulate.random_diffuser_mask`).
    lenslet_pitch_um : float
        Microlens pitch, micrometres.
    mask_seed : int
        Seed of the diffuser surface: one design is one physical diffuser.
    oversample : int
        Simulation grid points per sensor pixel along each axis (intensity is summed over
        each pixel). The widefield kind at the defaults focuses light more steeply than
        4 µm sampling allows and needs 2; a too coarse grid is reported with a
        VolreconWarning.
    """

    kind: str = "diffuser"
    shape_yx: tuple[int, int] = (128, 128)
    sensor_pixel_um: float = 4.0
    numerical_aperture: float = 0.4
    immersion_index: float = 1.33
    pupil_radius_um: float = 200.0
    pupil_to_sensor_um: float = 2000.0
    wavelength_um: float = 0.52
    bandwidth_um: float = 0.03
    wavelength_samples: int = 5
    diffuser_correlation_um: float = 30.0
    diffuser_height_rms_um: float = 0.2
    diffuser_index_step: float = 0.5
    lenslet_pitch_um: float = 130.0
    mask_seed: int = 0
    oversample: int = 1

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ConfigError(f"MicroscopeDesign kind must be one of {KINDS}; got {self.kind!r}")
        for name in ("sensor_pixel_um", "numerical_aperture", "immersion_index",
                     "pupil_radius_um", "pupil_to_sensor_um", "wavelength_um"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ConfigError(f"MicroscopeDesign {name} must be positive; got {value!r}")
        if not (isinstance(self.oversample, int) and self.oversample >= 1):
            raise ConfigError(
                f"MicroscopeDesign oversample must be a positive integer; got {self.oversample!r}")
        object.__setattr__(self, "shape_yx", (int(self.shape_yx[0]), int(self.shape_yx[1])))

    @property
    def magnification(self) -> float:
        """Lateral magnification sample → sensor, ``d · NA / R``."""
        return self.pupil_to_sensor_um * self.numerical_aperture / self.pupil_radius_um

    @property
    def sample_pixel_size_um(self) -> float:
        """One sensor pixel in the sample, micrometres."""
        return self.sensor_pixel_um / self.magnification

    def mask(self) -> PhaseMask:
        """The pupil element of this design on the simulation grid."""
        pixel = self.sensor_pixel_um / self.oversample
        grid = (self.shape_yx[0] * self.oversample, self.shape_yx[1] * self.oversample)
        if self.kind == "diffuser":
            return random_diffuser_mask(
                grid, correlation_length_um=self.diffuser_correlation_um,
                height_rms_um=self.diffuser_height_rms_um, index_step=self.diffuser_index_step,
                rng=self.mask_seed, pixel_size_um=pixel)
        if self.kind == "lightfield":
            return microlens_array_mask(grid, pitch_um=self.lenslet_pitch_um,
                                        focal_length_um=self.pupil_to_sensor_um,
                                        pixel_size_um=pixel)
        return thin_lens_mask(grid, focal_length_um=self.pupil_to_sensor_um,
                              pixel_size_um=pixel)

    def depths_um(self, n_planes: int, depth_step_um: float) -> FloatArray:
        """`n_planes` depths `depth_step_um` apart, centred on the focal plane."""
        if not (isinstance(n_planes, int) and n_planes >= 1):
            raise ConfigError(f"n_planes must be a positive integer; got {n_planes!r}")
        if not (math.isfinite(depth_step_um) and depth_step_um > 0):
            raise ConfigError(f"depth_step_um must be positive; got {depth_step_um!r}")
        return (np.arange(n_planes) - (n_planes - 1) / 2.0) * depth_step_um

    def psf_stack(self, depths_um: Sequence[float] | FloatArray, *,
                  lateral_offset_yx_um: tuple[float, float] = (0.0, 0.0),
                  workers: int | None = None) -> PSFStack:
        """Simulated PSF stack of this design at the given depths (see :func:`pupil_psf_stack`)."""
        waves, weights = emission_band(self.wavelength_um, self.bandwidth_um,
                                       samples=self.wavelength_samples)
        return pupil_psf_stack(
            self.mask(), depths_um, numerical_aperture=self.numerical_aperture,
            pupil_radius_um=self.pupil_radius_um, pupil_to_sensor_um=self.pupil_to_sensor_um,
            wavelength_um=waves, wavelength_weights=weights,
            immersion_index=self.immersion_index, lateral_offset_yx_um=lateral_offset_yx_um,
            bin_factor=self.oversample, workers=workers)
