"""From a raw bead scan to a PSF model and its report: the one calibration entry point."""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.calibrate.cleaning import (
    CleanedStack,
    bin_pixels,
    clean_psf_stack,
    normalization_option,
)
from volrecon.calibrate.compression import factor_psf_stack, stack_singular_values
from volrecon.calibrate.metrics import autocorrelation_fwhm, axial_resolution, depth_correlation
from volrecon.calibrate.registration import estimate_shift, shift_image
from volrecon.calibrate.report import CalibrationReport
from volrecon.errors import (
    ConfigError,
    DataError,
    ModelStoreError,
    ShapeError,
    UnitWarning,
    VolreconError,
)
from volrecon.io.files import replacing
from volrecon.models.base import Geometry, PSFModel
from volrecon.models.depth_convolution import DepthConvolutionPSF
from volrecon.models.field_varying import FieldVaryingPSF
from volrecon.models.low_rank import LowRankDepthPSF

__all__ = ["Calibration", "calibrate_file", "calibrate_stack", "default_report_dir", "output_paths"]


@dataclass(frozen=True)
class Calibration:
    """A calibrated PSF model with what calibration measured.

    Attributes
    ----------
    model : PSFModel
        ``DepthConvolutionPSF`` (full rank), ``LowRankDepthPSF`` (``rank`` given) or
        ``FieldVaryingPSF`` (several field positions).
    report : CalibrationReport
        Figures of merit; :meth:`CalibrationReport.summary_text` for people.
    psf_zyx : ndarray of shape (Z, Y, X) or (K, Z, Y, X), float32
        The cleaned (and, for several positions, registered and centred) PSF planes the
        model was built from.
    """

    model: PSFModel
    report: CalibrationReport
    psf_zyx: np.ndarray


def calibrate_stack(
    stack: Any,
    *,
    depth_step_um: float,
    pixel_size_um: float,
    depth_start_um: float = 0.0,
    dark: Any = None,
    positions_yx: Any = None,
    wavelength_nm: float | None = None,
    bin_factor: int = 1,
    crop_yx: tuple[int, int, int, int] | None = None,
    rank: int | str | None = None,
    energy: float = 0.999,
    hot_pixel_sigma: float | None = 6.0,
    support_sigma: float | None = 3.0,
    normalization: str = "stack",
    normalize: bool | None = None,
    dtype: Any = np.float32,
    source: str | None = None,
) -> Calibration:
    """Clean, register and compress a bead scan into a PSF model.

    Parameters
    ----------
    stack : ndarray of shape (Z, Y, X) or (K, Z, Y, X)
        Raw camera planes of a sub-resolution bead scanned through depth; with K field
        positions the first axis indexes the position. Any real dtype; not modified.
    depth_step_um : float
        Depth between planes, micrometres (> 0).
    pixel_size_um : float
        Pixel pitch in the sample plane before binning, micrometres (> 0).
    depth_start_um : float
        Depth of the first plane, micrometres.
    dark : ndarray of shape (Y, X) or (N, Y, X), optional
        Camera offset frame(s) with the scan's raw shape; default: each plane's border
        median is subtracted.
    positions_yx : array_like of shape (K, 2), optional
        Field position of each of the K scans, raw-image pixels ``(y, x)``; required for a
        4-D stack and only allowed with one.
    wavelength_nm : float, optional
        Emission wavelength (metadata; adds an Airy-equivalent NA to the report).
    bin_factor : int
        Lateral binning to match the video (sum of ``bin_factor²`` pixels).
    crop_yx : tuple of int, optional
        ``(y0, y1, x0, x1)`` window of the raw image to keep.
    rank : int, "auto" or None
        None: full-rank shift-invariant model (``DepthConvolutionPSF``). An integer 1..Z:
        ``LowRankDepthPSF`` with that many kernels, so the model's Z depth responses span
        exactly `rank` dimensions. ``"auto"``: the smallest rank keeping `energy` of the
        stack's squared norm. Not available with several field positions.
    energy : float
        Fraction in (0, 1] for ``rank="auto"``.
    hot_pixel_sigma : float or None
        Hot-pixel threshold in noise standard deviations; None: no suppression.
    support_sigma : float or None
        Threshold of the background mask (:func:`~volrecon.calibrate.mask_background`);
        None keeps every pixel.
    normalization : {"stack", "planes", "none"}
        "stack" (default): the model keeps the instrument's relative throughput per depth,
        each plane summing to its measured throughput (the brightest plane of all positions
        to 1). "planes" (``--normalise-planes``): every plane sums to 1. "none": camera
        counts. The measured throughput goes to the report and the model's metadata in
        every case.
    normalize : bool, optional
        Deprecated: True is ``normalization="planes"``, False ``normalization="none"``.
    dtype : {float32, float64}
        Model precision.
    source : str, optional
        Name of the input file, recorded in the report.

    Returns
    -------
    Calibration

    Raises
    ------
    ShapeError
        If the stack is not (Z, Y, X) or (K, Z, Y, X), or the dark frame does not match.
    DataError
        If the stack holds NaN/Inf or an empty plane.
    ConfigError
        If an option is out of range or options do not fit together.

    Notes
    -----
    Several field positions: each scan is cleaned like a single one; the reference is the
    position nearest the sensor centre; each scan's shift onto the reference is measured
    by upsampled cross-correlation over all its planes
    (:func:`~volrecon.calibrate.estimate_shift`, without phase whitening: PSF spectra fall
    off fast, and whitening would weight the noisy high frequencies as much as the signal);
    each scan is then moved by that shift plus the reference's offset from the centre, so
    its kernel obeys the model's centre convention; weights interpolate between the
    positions (:func:`~volrecon.models.interpolation_weights`) [1]_.

    References
    ----------
    .. [1] D. Flicker, F. Rigaut, "Anisoplanatic deconvolution of adaptive optics images",
       J. Opt. Soc. Am. A 22 (2005) 504-513.
    """
    geometry = _check_options(depth_step_um, pixel_size_um, depth_start_um, bin_factor,
                              wavelength_nm, energy, rank)
    normalization = normalization_option(normalization, normalize)
    raw = np.asarray(stack)
    if raw.ndim == 2:
        raise ShapeError(f"the bead scan is a single 2-D image of shape {raw.shape}; save the "
                         "scan as a multi-page TIFF with one page per depth (Z, Y, X)")
    if raw.ndim not in (3, 4):
        raise ShapeError(f"the bead scan must have shape (Z, Y, X) or (K, Z, Y, X); got "
                         f"{raw.shape}")
    if raw.ndim == 3 and positions_yx is not None:
        raise ConfigError(f"--positions needs a bead scan of shape (K, Z, Y, X) with K field "
                          f"positions; this scan has shape {raw.shape}, drop --positions")
    if raw.ndim == 4 and positions_yx is None:
        raise ConfigError(f"the bead scan has shape {raw.shape} = (K, Z, Y, X) with K = "
                          f"{raw.shape[0]} field positions; pass --positions with one "
                          "y_px,x_px row per position")
    scans = raw if raw.ndim == 4 else raw[None]
    z = scans.shape[1]
    if raw.ndim == 4 and rank is not None:
        raise ConfigError("--rank applies to a single-position scan; a field-varying model "
                          "keeps every measured kernel, drop --rank")
    if isinstance(rank, int) and rank > z:
        raise ConfigError(f"--rank {rank} is larger than the number of depth planes Z = {z}; "
                          f"use 1..{z} or 'auto'")
    positions = (None if raw.ndim == 3
                 else _binned_positions(positions_yx, scans.shape[0], crop_yx, bin_factor))
    cleaned: list[CleanedStack] = []
    for k in range(scans.shape[0]):
        try:
            cleaned.append(clean_psf_stack(scans[k], dark_yx=dark, crop_yx=crop_yx,
                                           bin_factor=bin_factor,
                                           hot_pixel_sigma=hot_pixel_sigma,
                                           support_sigma=support_sigma,
                                           normalization=normalization))
        except (DataError, ShapeError) as exc:
            if scans.shape[0] == 1:
                raise
            raise type(exc)(f"field position {k}: {exc}") from exc
    sums = np.stack([c.plane_sums for c in cleaned])
    if normalization == "stack" and len(cleaned) > 1:
        # Each scan was scaled to its own brightest plane; keep the positions' relative
        # throughput too (vignetting), relative to the brightest plane of all.
        cleaned = [replace(c, psf_zyx=(c.psf_zyx * np.float32(c.plane_sums.max() / sums.max())))
                   for c in cleaned]
    common = {
        "source": source,
        "depth_step_um": geometry.depth_step_um,
        "pixel_size_um": geometry.pixel_size_um,
        "depth_start_um": geometry.depth_start_um,
        "wavelength_nm": wavelength_nm,
        "bin_factor": int(bin_factor),
        "crop_yx": None if crop_yx is None else tuple(int(c) for c in crop_yx),
        "offset_source": "dark frame" if dark is not None else "border estimate",
        "background": np.stack([c.background for c in cleaned]),
        "hot_pixels": int(sum(c.hot_pixels for c in cleaned)),
        "support_fraction": float(np.mean([c.support_fraction for c in cleaned])),
        "plane_sums": sums,
        "throughput": sums / sums.max(),
        "normalization": normalization,
    }
    if positions is None:
        return _single(cleaned[0].psf_zyx, geometry, rank, energy, dtype, common)
    return _field(np.stack([c.psf_zyx for c in cleaned]), positions, geometry, dtype, common)


def _check_options(depth_step_um: float, pixel_size_um: float, depth_start_um: float,
                   bin_factor: int, wavelength_nm: float | None, energy: float,
                   rank: int | str | None) -> Geometry:
    def positive(value: Any, option: str) -> float:
        if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
            raise ConfigError(f"{option} must be a positive number of micrometres; got "
                              f"{value!r}")
        return float(value)

    step = positive(depth_step_um, "--depth-step (depth_step_um)")
    pixel = positive(pixel_size_um, "--pixel-size (pixel_size_um)")
    _warn_if_implausible(pixel, "--pixel-size (pixel_size_um)", PLAUSIBLE_PIXEL_SIZE_UM,
                         "a camera pixel referred to the sample plane")
    _warn_if_implausible(step, "--depth-step (depth_step_um)", PLAUSIBLE_DEPTH_STEP_UM,
                         "a bead-scan depth step")
    if not (isinstance(depth_start_um, int | float) and math.isfinite(depth_start_um)):
        raise ConfigError(f"--depth-start (depth_start_um) must be a finite number of "
                          f"micrometres; got {depth_start_um!r}")
    if not (isinstance(bin_factor, int) and bin_factor >= 1):
        raise ConfigError(f"--bin must be a positive integer; got {bin_factor!r}")
    if wavelength_nm is not None and not (isinstance(wavelength_nm, int | float)
                                          and math.isfinite(wavelength_nm)
                                          and wavelength_nm > 0):
        raise ConfigError(f"--wavelength must be a positive number of nanometres; got "
                          f"{wavelength_nm!r}")
    if not (isinstance(energy, int | float) and 0 < energy <= 1):
        raise ConfigError(f"--energy must be a fraction in (0, 1], e.g. 0.999; got {energy!r}")
    if rank is not None and rank != "auto" and not (isinstance(rank, int) and rank >= 1):
        raise ConfigError(f"--rank must be a positive integer or 'auto'; got {rank!r}")
    return Geometry(step, pixel * bin_factor, float(depth_start_um))


#: Ranges that are common practice, not limits: camera pixels referred to the sample (pixel
#: pitch / magnification) span about 0.05 µm (high-magnification microscopes) to 50 µm (macro
#: and lensless imaging at unit magnification); bead-scan depth steps about 0.05 µm (piezo
#: stages) to 100 µm (wide-field lensless volumes). A value outside is most often a unit
#: mix-up (nanometres typed as micrometres), so it is warned about, not refused.
PLAUSIBLE_PIXEL_SIZE_UM = (0.05, 50.0)
PLAUSIBLE_DEPTH_STEP_UM = (0.05, 100.0)


def _warn_if_implausible(value_um: float, option: str, plausible: tuple[float, float],
                         what: str) -> None:
    low, high = plausible
    if low <= value_um <= high:
        return
    if value_um > high:
        hint = f"if you typed nanometres, use {value_um / 1000:g}"
    else:
        hint = f"if you typed millimetres, use {value_um * 1000:g}"
    warnings.warn(f"{option} is {value_um:g} um, outside the {low:g}-{high:g} um common for "
                  f"{what}; the values are micrometres: {hint}", UnitWarning, stacklevel=3)


def _binned_positions(positions_yx: Any, k: int, crop_yx: tuple[int, int, int, int] | None,
                      bin_factor: int) -> np.ndarray:
    pos = np.asarray(positions_yx, dtype=np.float64)
    if pos.shape != (k, 2):
        raise ShapeError(f"--positions must give {k} rows of y_px,x_px (one per field "
                         f"position); got shape {pos.shape}")
    if not np.isfinite(pos).all():
        raise DataError("--positions contains NaN or Inf; give finite pixel coordinates")
    if crop_yx is not None:
        pos = pos - np.array([crop_yx[0], crop_yx[2]], dtype=np.float64)
    # Binned pixel i covers raw pixels i*b .. i*b + b - 1, centred at i*b + (b - 1)/2.
    return (pos - (bin_factor - 1) / 2.0) / bin_factor


#: Planes larger than this many pixels are binned for the depth correlation of the report:
#: its Z(Z-1)/2 padded FFTs dominate calibration time (about 20 ms per pair at 512²).
_CORRELATION_PIXELS = 512 * 512


def _metrics(psf_zyx: np.ndarray, geometry: Geometry) -> dict[str, Any]:
    pixels = psf_zyx.shape[1] * psf_zyx.shape[2]
    binning = max(1, math.ceil(math.sqrt(pixels / _CORRELATION_PIXELS)))
    ncc = depth_correlation(bin_pixels(psf_zyx, binning))
    per_plane, median = axial_resolution(ncc, geometry.depth_step_um)
    drift = np.full((max(psf_zyx.shape[0] - 1, 0), 2), np.nan)
    for i in range(psf_zyx.shape[0] - 1):
        if np.ptp(psf_zyx[i]) > 0 and np.ptp(psf_zyx[i + 1]) > 0:
            # A diagnostic: 0.05 px steps are plenty, and 5x cheaper than 0.01 px.
            drift[i] = estimate_shift(psf_zyx[i], psf_zyx[i + 1], upsample_factor=20,
                                      normalization=None)
    return {
        "correlation_binning": binning,
        "singular_values": stack_singular_values(psf_zyx),
        "depth_ncc": ncc,
        "axial_resolution_per_plane_um": per_plane,
        "axial_resolution_um": median,
        "lateral_fwhm_per_plane_um": autocorrelation_fwhm(psf_zyx) * geometry.pixel_size_um,
        "plane_drift_yx": drift,
    }


def _single(psf_zyx: np.ndarray, geometry: Geometry, rank: int | str | None, energy: float,
            dtype: Any, common: dict[str, Any]) -> Calibration:
    measured = _metrics(psf_zyx, geometry)
    factors = None if rank is None else factor_psf_stack(psf_zyx, rank=rank, energy=energy)
    report = CalibrationReport(
        model_kind=DepthConvolutionPSF.kind if factors is None else LowRankDepthPSF.kind,
        shape_zyx=(psf_zyx.shape[0], psf_zyx.shape[1], psf_zyx.shape[2]),
        rank=psf_zyx.shape[0] if factors is None else factors.rank,
        registration_shifts_yx=None,
        reference_position=None,
        position_residuals_yx=None,
        **common,
        **measured,
    )
    model: PSFModel
    if factors is None:
        model = DepthConvolutionPSF(psf_zyx, geometry, dtype=dtype,
                                    calibration=report.model_metadata())
    else:
        model = LowRankDepthPSF(factors.kernels_ryx, factors.weights_zr, geometry, dtype=dtype,
                                calibration=report.model_metadata())
    return Calibration(model=model, report=report, psf_zyx=psf_zyx)


def _field(psf_kzyx: np.ndarray, positions: np.ndarray, geometry: Geometry, dtype: Any,
           common: dict[str, Any]) -> Calibration:
    k, z, ny, nx = psf_kzyx.shape
    centre = np.array([ny // 2, nx // 2], dtype=np.float64)
    reference = int(np.argmin(np.linalg.norm(positions - centre, axis=1)))
    shifts = np.zeros((k, 2))
    kernels = np.empty_like(psf_kzyx)
    for i in range(k):
        if i != reference:
            shifts[i] = estimate_shift(psf_kzyx[reference], psf_kzyx[i],
                                       normalization=None)
        total = shifts[i] + centre - positions[reference]
        kernels[i] = np.clip(shift_image(psf_kzyx[i], (total[0], total[1])), 0.0, None)
    # Displacement of each scan from the reference: measured (-shift) minus nominal.
    residuals = -shifts - (positions - positions[reference])
    measured = _metrics(psf_kzyx[reference], geometry)
    report = CalibrationReport(
        model_kind=FieldVaryingPSF.kind,
        shape_zyx=(z, ny, nx),
        rank=z,
        registration_shifts_yx=shifts,
        reference_position=reference,
        position_residuals_yx=residuals,
        **common,
        **measured,
    )
    model = FieldVaryingPSF.from_positions(np.ascontiguousarray(kernels.transpose(1, 0, 2, 3)),
                                           positions, geometry, dtype=dtype,
                                           calibration=report.model_metadata())
    return Calibration(model=model, report=report, psf_zyx=kernels)


def output_paths(out: str | os.PathLike[str], report_dir: str | os.PathLike[str] | None
                 ) -> tuple[Path, Path]:
    """The model store and report folder of a calibration, checked before any work.

    Raises
    ------
    ModelStoreError
        If either exists and is not what volrecon writes there (a model store, a report).
    """
    out_path = Path(out)
    report_path = Path(report_dir) if report_dir is not None else default_report_dir(out_path)
    if out_path.exists() and not (out_path / "zarr.json").is_file():
        raise ModelStoreError(f"{out_path}: exists and is not a volrecon model store; choose "
                              "another --out path")
    if report_path.exists() and not (report_path / "summary.txt").is_file():
        raise ModelStoreError(f"{report_path}: exists and is not a calibration report; move "
                              "it or choose another --out path")
    return out_path, report_path


def default_report_dir(model_path: str | os.PathLike[str]) -> Path:
    """Where ``calibrate_file`` puts the report: ``NAME.report`` beside the model store.

    A trailing ``.zarr`` of the model's name is replaced, so ``bead.zarr`` gets
    ``bead.report``.
    """
    p = Path(model_path)
    stem = p.name[: -len(".zarr")] if p.name.endswith(".zarr") else p.name
    return p.with_name(f"{stem}.report")


def calibrate_file(
    stack_path: str | os.PathLike[str],
    out: str | os.PathLike[str],
    *,
    depth_step_um: float,
    pixel_size_um: float,
    dark_path: str | os.PathLike[str] | None = None,
    positions_path: str | os.PathLike[str] | None = None,
    report_dir: str | os.PathLike[str] | None = None,
    **options: Any,
) -> Calibration:
    """Calibrate a bead-scan TIFF and write the model store and its report.

    Parameters
    ----------
    stack_path : path-like
        Multi-page TIFF of shape (Z, Y, X), or (K, Z, Y, X) with `positions_path`.
    out : path-like
        Model store to write (a directory; ``PSFModel.load(out)`` reads it). An existing
        model store there is replaced; anything else there is refused.
    depth_step_um, pixel_size_um : float
        As for :func:`calibrate_stack`.
    dark_path : path-like, optional
        TIFF of the camera offset: one frame (Y, X) or several (N, Y, X), averaged.
    positions_path : path-like, optional
        CSV of field positions (see :func:`~volrecon.calibrate.read_positions`).
    report_dir : path-like, optional
        Report directory; default :func:`default_report_dir` of `out`.
    **options
        Any other keyword of :func:`calibrate_stack` (``depth_start_um``, ``rank``,
        ``energy``, ``bin_factor``, ``crop_yx``, ``wavelength_nm``, ...).

    Returns
    -------
    Calibration
        Its report's ``files`` lists what was written.

    Raises
    ------
    InputFileError
        If an input file is missing or unreadable.
    ModelStoreError
        If `out` or the report directory exists and is not one of ours.
    ShapeError, DataError, ConfigError
        As for :func:`calibrate_stack`; the message starts with the file concerned.

    Notes
    -----
    Nothing is written until calibration has succeeded. The report goes to a temporary
    directory and the model to a temporary store, each renamed into place, so a failure
    never leaves a partial model behind.
    """
    from volrecon.calibrate.stack_file import read_positions
    from volrecon.io.tiff import read_tiff_stack
    from volrecon.models.store import save_model

    out_path, report_path = output_paths(out, report_dir)
    # Options first: a typo should not cost reading a large scan.
    _check_options(depth_step_um, pixel_size_um, options.get("depth_start_um", 0.0),
                   options.get("bin_factor", 1), options.get("wavelength_nm"),
                   options.get("energy", 0.999), options.get("rank"))
    stack = read_tiff_stack(stack_path, what="bead scan")
    dark = None if dark_path is None else read_tiff_stack(dark_path, what="dark frame")
    positions = None
    if positions_path is not None:
        if stack.ndim != 4:
            raise ConfigError(f"{stack_path}: --positions needs a bead scan of shape "
                              f"(K, Z, Y, X); this one has shape {stack.shape}, drop "
                              "--positions")
        positions = read_positions(positions_path, stack.shape[0])
    try:
        result = calibrate_stack(stack, depth_step_um=depth_step_um,
                                 pixel_size_um=pixel_size_um, dark=dark, positions_yx=positions,
                                 source=str(stack_path), **options)
    except VolreconError as exc:
        where = dark_path if ("dark frame" in str(exc) and dark_path is not None) else stack_path
        raise type(exc)(f"{where}: {exc}") from exc
    with replacing(report_path) as staging:
        report = result.report.write(staging, psf_zyx=result.psf_zyx)
        save_model(result.model, out_path)
    files = tuple(str(report_path / Path(f).name) for f in report.files)
    return replace(result, report=replace(report, files=files))

