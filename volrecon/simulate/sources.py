"""Fields of a fluorescent point emitter: at a mask plane, or in a microscope's pupil."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from volrecon.errors import ConfigError
from volrecon.simulate.masks import circular_aperture, grid_coordinates

if TYPE_CHECKING:
    from volrecon._typing import ComplexArray, FloatArray

__all__ = ["collection_efficiency", "pupil_field", "spherical_wave"]


def _positive(name: str, value: float) -> float:
    if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
        raise ConfigError(f"{name} must be a positive finite number; got {value!r}")
    return float(value)


def spherical_wave(shape_yx: tuple[int, int], *, distance_um: float, wavelength_um: float,
                   pixel_size_um: float, lateral_offset_yx_um: tuple[float, float] = (0.0, 0.0),
                   refractive_index: float = 1.0) -> ComplexArray:
    """Diverging spherical wave of a point source, sampled on a plane `distance_um` away.

    Parameters
    ----------
    shape_yx : tuple of int
        Grid size of the plane.
    distance_um : float
        Axial distance from the point to the plane, micrometres.
    wavelength_um : float
        Vacuum wavelength, micrometres.
    pixel_size_um : float
        Grid spacing, micrometres.
    lateral_offset_yx_um : tuple of float
        Position of the point across the axis, micrometres.
    refractive_index : float
        Index of the medium between point and plane.

    Returns
    -------
    ndarray of shape `shape_yx`, complex64
        ``exp(i k n r) / sqrt(4π r²)`` with ``r`` the distance from the point: the field of
        an isotropic source of unit power (intensity per µm² = 1 / (4π r²)).
    """
    z = _positive("distance_um", distance_um)
    k = 2.0 * np.pi / _positive("wavelength_um", wavelength_um)
    n = _positive("refractive_index", refractive_index)
    path = _spherical_path_um(shape_yx, distance_um=z, pixel_size_um=pixel_size_um,
                              lateral_offset_yx_um=lateral_offset_yx_um, refractive_index=n)
    r = path / n
    field: ComplexArray = (np.exp(1j * np.mod(k * path, 2.0 * np.pi))
                           / np.sqrt(4.0 * np.pi * r**2)).astype(np.complex64)
    return field


def collection_efficiency(numerical_aperture: float, immersion_index: float) -> float:
    """Fraction of an isotropic emitter's light inside the cone of a numerical aperture.

    ``(1 - cos θ) / 2`` with ``sin θ = NA / n``: the solid angle of the cone over 4π.
    """
    na = _positive("numerical_aperture", numerical_aperture)
    n = _positive("immersion_index", immersion_index)
    if na >= n:
        raise ConfigError(
            f"numerical_aperture {na} must be below the immersion index {n}; lower the NA")
    return 0.5 * (1.0 - math.sqrt(1.0 - (na / n) ** 2))


def pupil_field(shape_yx: tuple[int, int], *, depth_um: float, numerical_aperture: float,
                pupil_radius_um: float, wavelength_um: float, pixel_size_um: float,
                immersion_index: float = 1.33,
                lateral_offset_yx_um: tuple[float, float] = (0.0, 0.0)) -> ComplexArray:
    """Field that a point emitter in the sample produces in a microscope's pupil plane.

    Parameters
    ----------
    shape_yx : tuple of int
        Grid size of the pupil plane.
    depth_um : float
        Axial distance of the point from the focal plane, micrometres (positive: away from
        the objective).
    numerical_aperture : float
        Objective NA ``n sin θ_max``.
    pupil_radius_um : float
        Radius of the pupil on this grid, micrometres.
    wavelength_um : float
        Vacuum wavelength, micrometres.
    pixel_size_um : float
        Grid spacing, micrometres.
    immersion_index : float
        Refractive index of the sample medium (1.33 for a hydrogel or water).
    lateral_offset_yx_um : tuple of float
        Position of the point across the axis in the sample, micrometres.

    Returns
    -------
    ndarray of shape `shape_yx`, complex64
        Uniform amplitude inside the pupil, scaled so the pupil carries the
        :func:`collection_efficiency` of a unit-power emitter.

    Notes
    -----
    The objective maps each plane wave of the point's angular spectrum (its spherical wave
    written as plane waves) to one pupil position ``u``, with ``n sin θ = NA |u| / R``. A
    point at depth ``δz`` adds the propagation phase of that plane wave,
    ``k δz sqrt(n² - (NA |u| / R)²)`` (piston removed); a lateral offset ``s`` adds the tilt
    ``k (NA / R) u · s``, which moves the image by ``d NA / R · s`` on a sensor a distance
    ``d`` behind the pupil (an upright image). Apodisation of the objective is neglected.
    """
    na = _positive("numerical_aperture", numerical_aperture)
    n = _positive("immersion_index", immersion_index)
    radius = _positive("pupil_radius_um", pupil_radius_um)
    k = 2.0 * np.pi / _positive("wavelength_um", wavelength_um)
    efficiency = collection_efficiency(na, n)
    aperture = circular_aperture(shape_yx, radius_um=radius, pixel_size_um=pixel_size_um)
    path = _pupil_path_um(shape_yx, depth_um=depth_um, numerical_aperture=na,
                          pupil_radius_um=radius, pixel_size_um=pixel_size_um,
                          immersion_index=n, lateral_offset_yx_um=lateral_offset_yx_um)
    return _pupil_field(aperture, path, wavelength_um=2.0 * np.pi / k, efficiency=efficiency,
                        pixel_size_um=pixel_size_um)


def _pupil_field(aperture: FloatArray, path_um: FloatArray, *, wavelength_um: float,
                 efficiency: float, pixel_size_um: float) -> ComplexArray:
    """Pupil field from its aperture and optical path, carrying `efficiency` of unit power."""
    phase = np.mod((2.0 * np.pi / wavelength_um) * path_um, 2.0 * np.pi)
    power = float(np.sum(aperture.astype(np.float64) ** 2)) * pixel_size_um**2
    scale = math.sqrt(efficiency / power)
    field: ComplexArray = (scale * aperture * np.exp(1j * phase)).astype(np.complex64)
    return field


def _pupil_path_um(shape_yx: tuple[int, int], *, depth_um: float, numerical_aperture: float,
                   pupil_radius_um: float, pixel_size_um: float, immersion_index: float,
                   lateral_offset_yx_um: tuple[float, float]) -> FloatArray:
    """Optical path (µm) across the pupil of a point at `depth_um`: defocus plus tilt."""
    y, x = grid_coordinates(shape_yx, pixel_size_um)
    na, n = numerical_aperture, immersion_index
    sin_n = np.clip(na * np.sqrt(y**2 + x**2) / pupil_radius_um, 0.0, na)
    defocus = depth_um * (np.sqrt(n**2 - sin_n**2) - n)
    tilt = (na / pupil_radius_um) * (y * lateral_offset_yx_um[0] + x * lateral_offset_yx_um[1])
    return defocus + tilt


def _spherical_path_um(shape_yx: tuple[int, int], *, distance_um: float, pixel_size_um: float,
                       lateral_offset_yx_um: tuple[float, float],
                       refractive_index: float) -> FloatArray:
    """Optical path (µm) from a point `distance_um` away to each pixel of a plane."""
    y, x = grid_coordinates(shape_yx, pixel_size_um)
    r = np.sqrt((y - lateral_offset_yx_um[0]) ** 2 + (x - lateral_offset_yx_um[1]) ** 2
                + distance_um**2)
    return refractive_index * r
