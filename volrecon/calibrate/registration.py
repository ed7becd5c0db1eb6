"""Sub-pixel registration by upsampled phase cross-correlation, and sub-pixel shifting."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.fft

from volrecon.errors import ConfigError, DataError, ShapeError

__all__ = ["estimate_shift", "shift_image"]

_NORMALIZATIONS = ("phase", None)


def estimate_shift(reference: Any, moving: Any, *, upsample_factor: int = 100,
                   normalization: str | None = "phase") -> tuple[float, float]:
    """Shift ``(dy, dx)`` that moves `moving` onto `reference`, to ``1 / upsample_factor`` px.

    The peak of the cross-correlation is found on the pixel grid by FFT, then refined in a
    1.5-pixel neighbourhood on a grid ``upsample_factor`` times finer by a matrix-multiply DFT
    of the cross-power spectrum, which costs far less than upsampling the whole array [1]_.

    Parameters
    ----------
    reference, moving : ndarray of shape (..., Y, X)
        Images of the same shape. With leading axes (e.g. the depth planes of a PSF stack)
        their cross-power spectra are summed first, so the one shift shared by all planes
        is found.
    upsample_factor : int
        Precision of the refinement, 1 (integer shifts) to 1000.
    normalization : {"phase", None}
        ``"phase"``: whiten the summed cross-power spectrum (phase correlation, robust to
        blur and slow illumination changes); None: plain cross-correlation.

    Returns
    -------
    tuple of float
        ``(dy, dx)`` in pixels: :func:`shift_image` of `moving` by it matches `reference`.
        Shifts are in ``(-N/2, N/2]`` per axis (circular ambiguity).

    Raises
    ------
    ShapeError
        If the shapes differ or have fewer than 2 axes.
    DataError
        If either input is not finite or is constant (nothing to correlate).
    ConfigError
        If `upsample_factor` or `normalization` is invalid.

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman, J. R. Fienup, "Efficient subpixel image
       registration algorithms", Opt. Lett. 33 (2008) 156-158.

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[:32, :32]
    >>> ref = np.exp(-((y - 16) ** 2 + (x - 15) ** 2) / 8.0)
    >>> mov = np.exp(-((y - 18.5) ** 2 + (x - 14) ** 2) / 8.0)
    >>> [round(s, 2) for s in estimate_shift(ref, mov, normalization=None)]
    [-2.5, 1.0]
    """
    ref = np.asarray(reference, dtype=np.float64)
    mov = np.asarray(moving, dtype=np.float64)
    if ref.shape != mov.shape or ref.ndim < 2:
        raise ShapeError(f"reference and moving must have the same shape (..., Y, X); got "
                         f"{ref.shape} and {mov.shape}")
    if not (isinstance(upsample_factor, int | np.integer) and 1 <= upsample_factor <= 1000):
        raise ConfigError(f"upsample_factor must be an integer from 1 to 1000; got "
                          f"{upsample_factor!r}")
    if normalization not in _NORMALIZATIONS:
        raise ConfigError(f"normalization must be 'phase' or None; got {normalization!r}")
    for name, a in (("reference", ref), ("moving", mov)):
        if not np.isfinite(a).all():
            raise DataError(f"{name} contains NaN or Inf; clean the images before registering")
        if np.ptp(a) == 0:
            raise DataError(f"{name} is constant; registration needs structure to correlate")
    shape = ref.shape[-2:]
    product = scipy.fft.fft2(ref) * scipy.fft.fft2(mov).conj()
    product = product.reshape(-1, *shape).sum(axis=0)
    if normalization == "phase":
        product /= np.maximum(np.abs(product), 100 * np.finfo(np.float64).eps)
    correlation = scipy.fft.ifft2(product)
    peak = np.array(np.unravel_index(int(np.argmax(np.abs(correlation))), shape), dtype=float)
    size = np.array(shape, dtype=float)
    wrap = peak > np.fix(size / 2)
    peak[wrap] -= size[wrap]
    if upsample_factor == 1:
        return float(peak[0]), float(peak[1])
    up = float(upsample_factor)
    peak = np.round(peak * up) / up
    region = math.ceil(up * 1.5)
    centre = np.fix(region / 2.0)
    offsets = centre - peak * up
    fine = _dft_near(product, region, up, offsets)
    fine_peak = np.array(np.unravel_index(int(np.argmax(np.abs(fine))), fine.shape), dtype=float)
    shift = peak + (fine_peak - centre) / up
    return float(shift[0]), float(shift[1])


def _dft_near(spectrum: np.ndarray, region: int, up: float, offsets: np.ndarray) -> np.ndarray:
    """Inverse DFT of `spectrum` sampled on a ``region``² grid of step 1/up around `offsets`.

    ``out[a, b] = Σ_{ky, kx} S[ky, kx] exp(2πi (ky (a - oy) / (up Ny) + kx (b - ox) / (up Nx)))``
    written as two small matrix products.
    """
    ny, nx = spectrum.shape
    samples = np.arange(region, dtype=float)
    kernel_y = np.exp(2j * np.pi * np.outer(samples - offsets[0],
                                            np.fft.fftfreq(ny, d=up)))  # (region, ny)
    kernel_x = np.exp(2j * np.pi * np.outer(np.fft.fftfreq(nx, d=up),
                                            samples - offsets[1]))  # (nx, region)
    return kernel_y @ spectrum @ kernel_x  # type: ignore[no-any-return]


def shift_image(image: Any, shift_yx: tuple[float, float]) -> np.ndarray:
    """Translate images by a sub-pixel ``(dy, dx)``, filling with zeros; float32.

    Content moved past the edge is dropped. The shift is applied as a linear phase in the
    Fourier domain of a zero-padded copy (exact for band-limited content; no interpolation
    blur), so no content wraps around.

    Parameters
    ----------
    image : ndarray of shape (..., Y, X)
        Images; every leading index is shifted by the same amount.
    shift_yx : tuple of float
        ``(dy, dx)`` in pixels: the value at ``(y, x)`` moves to ``(y + dy, x + dx)``.

    Returns
    -------
    ndarray of the input shape, float32

    Raises
    ------
    ShapeError
        If `image` has fewer than 2 axes.
    DataError
        If the shift is not finite.

    Examples
    --------
    >>> import numpy as np
    >>> a = np.zeros((8, 8)); a[2, 3] = 1.0
    >>> b = shift_image(a, (1.0, 2.0))
    >>> np.unravel_index(int(np.argmax(b)), b.shape)
    (np.int64(3), np.int64(5))
    """
    a = np.asarray(image)
    if a.ndim < 2:
        raise ShapeError(f"image must have at least 2 axes (..., Y, X); got shape {a.shape}")
    dy, dx = (float(s) for s in shift_yx)
    if not (math.isfinite(dy) and math.isfinite(dx)):
        raise DataError(f"shift must be finite; got {(dy, dx)}")
    ny, nx = a.shape[-2:]
    if dy == round(dy) and dx == round(dx):
        return _integer_shift(a, round(dy), round(dx))
    # Pad by the shift plus a margin for the ringing of non-band-limited content.
    py = scipy.fft.next_fast_len(ny + 2 * (math.ceil(abs(dy)) + 8), real=True)
    px = scipy.fft.next_fast_len(nx + 2 * (math.ceil(abs(dx)) + 8), real=True)
    oy, ox = (py - ny) // 2, (px - nx) // 2
    padded = np.zeros((*a.shape[:-2], py, px), dtype=np.float64)
    padded[..., oy : oy + ny, ox : ox + nx] = a
    spectrum = scipy.fft.rfft2(padded)
    fy = np.fft.fftfreq(py)[:, None]
    fx = np.fft.rfftfreq(px)[None, :]
    spectrum *= np.exp(-2j * np.pi * (fy * dy + fx * dx))
    moved = scipy.fft.irfft2(spectrum, s=(py, px))
    return np.ascontiguousarray(moved[..., oy : oy + ny, ox : ox + nx], dtype=np.float32)


def _integer_shift(a: np.ndarray, dy: int, dx: int) -> np.ndarray:
    ny, nx = a.shape[-2:]
    out = np.zeros(a.shape, dtype=np.float32)
    src_y = slice(max(0, -dy), min(ny, ny - dy))
    dst_y = slice(max(0, dy), min(ny, ny + dy))
    src_x = slice(max(0, -dx), min(nx, nx - dx))
    dst_x = slice(max(0, dx), min(nx, nx + dx))
    if src_y.start < src_y.stop and src_x.start < src_x.stop:
        out[..., dst_y, dst_x] = a[..., src_y, src_x]
    return out
