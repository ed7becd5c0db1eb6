"""Synthetic bead scans for the calibration tests (made here, independent of simulate/)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage


def gaussian_stack(z: int, n: int, *, waist_px: float = 1.4, rayleigh_planes: float = 3.0,
                   centre: tuple[float, float] | None = None) -> np.ndarray:
    """Defocus-like stack: Gaussians of width w0·sqrt(1 + (dz/zR)²), each plane sums to 1."""
    cy, cx = centre if centre is not None else (n // 2, n // 2)
    yy, xx = np.mgrid[:n, :n]
    widths = waist_px * np.sqrt(1 + ((np.arange(z) - (z - 1) / 2) / rayleigh_planes) ** 2)
    stack = np.stack([np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * w**2)) for w in widths])
    return stack / stack.sum(axis=(1, 2), keepdims=True)


def speckle_stack(rng: np.random.Generator, z: int, n: int, *, aperture: float = 0.22,
                  defocus_rad: float = 30.0, roughness: float = 3.0) -> np.ndarray:
    """Caustic PSFs of a rough phase plate: |FT(pupil · e^{iφ} · e^{i α z ρ²})|², unit sums.

    A smooth random phase φ over a circular pupil makes a caustic pattern; the defocus term
    (α grows linearly with the plane index) changes it with depth, so planes decorrelate.
    """
    f = np.fft.fftfreq(n)
    fy, fx = np.meshgrid(f, f, indexing="ij")
    rho2 = (fy**2 + fx**2) / aperture**2
    pupil = (rho2 <= 1.0).astype(float)
    phase = scipy.ndimage.gaussian_filter(rng.standard_normal((n, n)), 2.0, mode="wrap")
    phase *= roughness / phase.std()
    planes = []
    for i in range(z):
        alpha = defocus_rad * (i - (z - 1) / 2) / max(z - 1, 1)
        field = pupil * np.exp(1j * (phase + alpha * rho2))
        planes.append(np.fft.fftshift(np.abs(np.fft.ifft2(field)) ** 2))
    stack = np.array(planes)
    return stack / stack.sum(axis=(1, 2), keepdims=True)


def raw_scan(rng: np.random.Generator, psf: np.ndarray, *, photons: float = 5e4,
             offset: float = 100.0, hot: int = 0, dark_frames: int = 8
             ) -> tuple[np.ndarray, np.ndarray]:
    """Camera planes Poisson(photons · psf + offset + hot) and matching dark frames (uint16).

    `hot` pixels at random places carry an extra 3000 counts of dark current in every frame,
    the scan's and the dark's, as a camera's hot pixels do.
    """
    current = np.zeros(psf.shape[-2:])
    if hot:
        ys = rng.integers(2, psf.shape[-2] - 2, hot)
        xs = rng.integers(2, psf.shape[-1] - 2, hot)
        current[ys, xs] = 3000.0
    counts = rng.poisson(photons * psf + offset + current).astype(np.uint16)
    dark = rng.poisson(np.broadcast_to(offset + current, (dark_frames, *current.shape)))
    return counts, dark.astype(np.uint16)


@pytest.fixture
def gaussian():
    return gaussian_stack


@pytest.fixture
def speckle():
    return speckle_stack


@pytest.fixture
def camera():
    return raw_scan
