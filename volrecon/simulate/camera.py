"""A scientific camera: photons in, quantised counts (ADU) out."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.errors import ConfigError, DataError, ShapeError

if TYPE_CHECKING:
    from volrecon._typing import FloatArray, RNGLike

__all__ = ["Camera"]


def _check(name: str, value: float, *, positive: bool = False, at_most: float | None = None
           ) -> None:
    ok = isinstance(value, int | float) and math.isfinite(value) and (
        value > 0 if positive else value >= 0)
    if at_most is not None:
        ok = ok and value <= at_most
    if not ok:
        bound = "positive" if positive else "non-negative"
        limit = f" and at most {at_most}" if at_most is not None else ""
        raise ConfigError(f"Camera {name} must be a {bound} number{limit}; got {value!r}")


@dataclass(frozen=True)
class Camera:
    """Photometric model of a camera, after the linear sensor model of EMVA 1288.

    Attributes
    ----------
    quantum_efficiency : float
        Fraction of arriving photons converted to photo-electrons, in (0, 1].
    gain_adu_per_electron : float
        System gain ``K``: digital counts per electron.
    read_noise_electrons : float
        Root-mean-square read noise, electrons (Gaussian).
    offset_adu : float
        Black level added to every pixel, counts.
    dark_current_electrons_per_s : float
        Mean thermal electrons per pixel per second.
    exposure_s : float
        Exposure time, seconds (scales the dark current and hot pixels only: the photons
        given to :meth:`expose` are those of one exposure).
    bit_depth : int
        Output range ``0 .. 2**bit_depth - 1``, at most 16 (stored as uint16).
    full_well_electrons : float or None
        Electrons a pixel holds before it saturates; None for no limit.
    hot_pixel_fraction : float
        Fraction of pixels with extra dark current (fixed pattern), in [0, 1).
    hot_pixel_electrons_per_s : float
        Extra dark current of a hot pixel, electrons per second.
    hot_pixel_seed : int
        Seed of the hot-pixel pattern: the same camera has the same hot pixels in every
        recording.

    Notes
    -----
    Per pixel and exposure, with ``μ_p`` photons arriving:
    ``e ~ Poisson(η μ_p + μ_d)`` with ``μ_d = (dark + hot) · t``; ``e`` is clipped at the full
    well; ``y = round(offset + K (e + n_r))`` with ``n_r ~ N(0, σ_r²)``, clipped to the bit
    range. Hence ``E[y] = offset + K (η μ_p + μ_d)`` and
    ``Var[y] = K² (η μ_p + μ_d + σ_r²) + 1/12`` away from clipping [1]_.

    References
    ----------
    .. [1] EMVA Standard 1288, Standard for Characterization of Image Sensors and Cameras,
       European Machine Vision Association, release 3.1 (2016): the linear camera model.

    Examples
    --------
    >>> import numpy as np
    >>> cam = Camera(read_noise_electrons=0.0, dark_current_electrons_per_s=0.0)
    >>> cam.expose(np.zeros((2, 3)), rng=0)
    array([[100, 100, 100],
           [100, 100, 100]], dtype=uint16)
    """

    quantum_efficiency: float = 0.8
    gain_adu_per_electron: float = 0.5
    read_noise_electrons: float = 1.6
    offset_adu: float = 100.0
    dark_current_electrons_per_s: float = 0.5
    exposure_s: float = 0.02
    bit_depth: int = 16
    full_well_electrons: float | None = 30000.0
    hot_pixel_fraction: float = 0.0
    hot_pixel_electrons_per_s: float = 5000.0
    hot_pixel_seed: int = 0

    def __post_init__(self) -> None:
        _check("quantum_efficiency", self.quantum_efficiency, positive=True, at_most=1.0)
        _check("gain_adu_per_electron", self.gain_adu_per_electron, positive=True)
        _check("read_noise_electrons", self.read_noise_electrons)
        _check("offset_adu", self.offset_adu)
        _check("dark_current_electrons_per_s", self.dark_current_electrons_per_s)
        _check("exposure_s", self.exposure_s, positive=True)
        _check("hot_pixel_fraction", self.hot_pixel_fraction, at_most=0.999)
        _check("hot_pixel_electrons_per_s", self.hot_pixel_electrons_per_s)
        if self.full_well_electrons is not None:
            _check("full_well_electrons", self.full_well_electrons, positive=True)
        if not (isinstance(self.bit_depth, int) and 1 <= self.bit_depth <= 16):
            raise ConfigError(f"Camera bit_depth must be an integer 1..16; got {self.bit_depth!r}")

    @property
    def max_adu(self) -> int:
        """Largest count the camera can output."""
        return int(2**self.bit_depth) - 1

    def hot_pixels(self, shape_yx: tuple[int, int]) -> np.ndarray:
        """Boolean map of this camera's hot pixels on a sensor of `shape_yx` (fixed pattern)."""
        if self.hot_pixel_fraction == 0:
            return np.zeros(shape_yx, dtype=bool)
        return np.random.default_rng(self.hot_pixel_seed).random(shape_yx) < self.hot_pixel_fraction

    def dark_electrons(self, shape_yx: tuple[int, int]) -> FloatArray:
        """Mean thermal electrons per pixel in one exposure, shape `shape_yx`, float64."""
        rate = np.full(shape_yx, self.dark_current_electrons_per_s, dtype=np.float64)
        rate += self.hot_pixel_electrons_per_s * self.hot_pixels(shape_yx)
        return rate * self.exposure_s

    def expected_adu(self, photons_yx: FloatArray) -> FloatArray:
        """Noise-free mean counts for mean photons per pixel (ignoring clipping), float32."""
        photons = self._photons(photons_yx)
        electrons = self.quantum_efficiency * photons + self.dark_electrons(photons.shape[-2:])
        return (self.offset_adu + self.gain_adu_per_electron * electrons).astype(np.float32)

    def expose(self, photons_yx: FloatArray, *, rng: RNGLike = None) -> np.ndarray:
        """Record exposures: mean photons per pixel (..., Y, X) → counts, uint16.

        Parameters
        ----------
        photons_yx : ndarray of shape (..., Y, X)
            Expected photons arriving at each pixel during one exposure (>= 0); leading axes
            are separate exposures (e.g. frames).
        rng : numpy Generator, int or None
            Source of the shot and read noise.

        Returns
        -------
        ndarray of the same shape, uint16
            Counts as the camera would write them.

        Raises
        ------
        ShapeError
            If `photons_yx` has fewer than two axes.
        DataError
            If it holds negative or non-finite values.
        """
        photons = self._photons(photons_yx)
        generator = np.random.default_rng(rng)
        mean_electrons = self.quantum_efficiency * photons + self.dark_electrons(photons.shape[-2:])
        electrons = generator.poisson(mean_electrons).astype(np.float64)
        if self.full_well_electrons is not None:
            np.minimum(electrons, self.full_well_electrons, out=electrons)
        if self.read_noise_electrons > 0:
            electrons += self.read_noise_electrons * generator.standard_normal(electrons.shape)
        counts = np.rint(self.offset_adu + self.gain_adu_per_electron * electrons)
        return np.clip(counts, 0, self.max_adu).astype(np.uint16)

    def dark_frames(self, shape_yx: tuple[int, int], n_frames: int, *, rng: RNGLike = None
                    ) -> np.ndarray:
        """Exposures with the shutter closed: (n_frames, Y, X) uint16."""
        if not (isinstance(n_frames, int) and n_frames >= 1):
            raise ConfigError(f"n_frames must be a positive integer; got {n_frames!r}")
        return self.expose(np.zeros((n_frames, *shape_yx)), rng=rng)

    @staticmethod
    def _photons(photons_yx: FloatArray) -> FloatArray:
        photons = np.asarray(photons_yx, dtype=np.float64)
        if photons.ndim < 2:
            raise ShapeError(
                f"photons_yx must have at least 2 axes (..., Y, X); got shape {photons.shape}")
        if not np.isfinite(photons).all() or (photons < 0).any():
            raise DataError("photons_yx must be finite and non-negative; clip the scene first")
        return photons
