"""Calibration: from a raw bead scan to a registered, compressed PSF model and its report.

The stages, each usable on its own: :func:`clean_psf_stack` (offset, hot pixels, clip, bin,
normalise), :func:`estimate_shift` / :func:`shift_image` (sub-pixel registration),
:func:`factor_psf_stack` (truncated SVD across depth), the figures of merit in
:mod:`volrecon.calibrate.metrics`, and :func:`calibrate_stack` / :func:`calibrate_file`,
which chain them and build the model.
"""

from volrecon.calibrate.calibration import (
    Calibration,
    calibrate_file,
    calibrate_stack,
    default_report_dir,
)
from volrecon.calibrate.cleaning import (
    CleanedStack,
    bin_pixels,
    border_background,
    clean_psf_stack,
    crop_pixels,
    mask_background,
    suppress_hot_pixels,
)
from volrecon.calibrate.compression import (
    DepthFactors,
    factor_psf_stack,
    retained_energy,
    select_rank,
    stack_singular_values,
)
from volrecon.calibrate.lenslet import calibrate_lenslet_file, calibrate_lenslet_stack
from volrecon.calibrate.lenslet_report import LensletReport, lenslet_report
from volrecon.calibrate.metrics import autocorrelation_fwhm, axial_resolution, depth_correlation
from volrecon.calibrate.options import parse_crop, parse_rank
from volrecon.calibrate.registration import estimate_shift, shift_image
from volrecon.calibrate.report import CalibrationReport
from volrecon.calibrate.stack_file import read_positions
from volrecon.io.tiff import read_tiff_stack

__all__ = [
    "Calibration",
    "CalibrationReport",
    "CleanedStack",
    "DepthFactors",
    "LensletReport",
    "autocorrelation_fwhm",
    "axial_resolution",
    "bin_pixels",
    "border_background",
    "calibrate_file",
    "calibrate_lenslet_file",
    "calibrate_lenslet_stack",
    "calibrate_stack",
    "clean_psf_stack",
    "crop_pixels",
    "default_report_dir",
    "depth_correlation",
    "estimate_shift",
    "factor_psf_stack",
    "lenslet_report",
    "mask_background",
    "parse_crop",
    "parse_rank",
    "read_positions",
    "read_tiff_stack",
    "retained_energy",
    "select_rank",
    "shift_image",
    "stack_singular_values",
    "suppress_hot_pixels",
]
