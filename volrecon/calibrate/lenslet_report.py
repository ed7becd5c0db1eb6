"""Calibration report of a lenslet-array model: depth discrimination per sub-position."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.calibrate.cleaning import bin_pixels
from volrecon.calibrate.metrics import axial_resolution, depth_correlation
from volrecon.calibrate.report import _AXIAL_CRITERION, _json

if TYPE_CHECKING:
    from volrecon.models.periodic import LensletPSF

__all__ = ["LensletReport", "lenslet_report"]

#: Sub-position stacks larger than this many pixels per plane are binned for the
#: correlations (as for the other kinds' report: their padded FFTs dominate the cost).
_CORRELATION_PIXELS = 512 * 512


@dataclass(frozen=True)
class LensletReport:
    """How well each sub-position of a lenslet model tells its depths apart.

    Attributes
    ----------
    source : str or None
        The bead-scan file, if calibration started from one.
    lenslet_pitch : int
        ``N``: sub-positions per lenslet and axis.
    shape_zyx : tuple of int
        Volume grid of the model.
    depth_step_um, pixel_size_um, depth_start_um : float
        Model geometry.
    depth_ncc : ndarray of shape (N, N, Z, Z)
        Per sub-position ``(i, j)``, the normalised cross-correlation between the responses
        of every pair of planes, peak over lateral shifts
        (:func:`~volrecon.calibrate.metrics.depth_correlation`).
    correlation_binning : int
        Lateral binning applied to the responses for `depth_ncc` only (1: none).
    axial_resolution_um : ndarray of shape (N, N)
        Per sub-position, the median over planes of the depth distance at which the
        correlation falls below 0.5 (:func:`~volrecon.calibrate.metrics.axial_resolution`);
        NaN where no plane decorrelates within the scan.
    calibration : dict
        The cleaning facts the model carries (offset, hot pixels, throughput ...).
    files : tuple of str
        Files :meth:`write` produced.
    """

    source: str | None
    lenslet_pitch: int
    shape_zyx: tuple[int, int, int]
    depth_step_um: float
    pixel_size_um: float
    depth_start_um: float
    depth_ncc: np.ndarray
    correlation_binning: int
    axial_resolution_um: np.ndarray
    calibration: dict[str, Any]
    files: tuple[str, ...] = field(default=())

    @property
    def neighbour_ncc(self) -> np.ndarray:
        """(N, N, Z - 1): correlation between planes ``z`` and ``z + 1`` per sub-position."""
        z = self.shape_zyx[0]
        return self.depth_ncc[:, :, np.arange(z - 1), np.arange(1, z)]

    @property
    def distinguishable_planes(self) -> np.ndarray:
        """(N, N): scanned depth range over the axial resolution (at least 1), the rule of
        :attr:`CalibrationReport.distinguishable_planes`; NaN where undetermined."""
        extent = self.shape_zyx[0] * self.depth_step_um
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.maximum(1.0, extent / self.axial_resolution_um)

    def to_dict(self) -> dict[str, Any]:
        """Everything as JSON-compatible values (NaN written as None)."""
        return {
            "source": self.source,
            "model_kind": "lenslet",
            "lenslet_pitch": self.lenslet_pitch,
            "shape_zyx": list(self.shape_zyx),
            "depth_step_um": self.depth_step_um,
            "pixel_size_um": self.pixel_size_um,
            "depth_start_um": self.depth_start_um,
            "axial_resolution_criterion": _AXIAL_CRITERION,
            "correlation_binning": self.correlation_binning,
            "depth_ncc": _json(self.depth_ncc),
            "neighbour_ncc": _json(self.neighbour_ncc),
            "axial_resolution_um": _json(self.axial_resolution_um),
            "distinguishable_planes": _json(self.distinguishable_planes),
            "calibration": self.calibration,
            "files": [Path(f).name for f in self.files],
        }

    def summary_text(self) -> str:
        """A few lines a person reads at the end of ``volrecon calibrate --lenslet-pitch``."""
        z, ny, nx = self.shape_zyx
        n = self.lenslet_pitch
        lines = [f"PSF model: lenslet, {n} x {n} sub-positions, {z} planes x {ny} x {nx} px, "
                 f"depth step {self.depth_step_um:g} um from {self.depth_start_um:g} um, "
                 f"pixel {self.pixel_size_um:g} um"]
        if self.source:
            lines.append(f"source: {self.source}")
        cal = self.calibration
        if "hot_pixels" in cal:
            lines.append(f"cleaning: {cal.get('offset_source', 'offset')} subtracted; "
                         f"{cal['hot_pixels']} hot-pixel values replaced; "
                         f"{float(cal.get('support_fraction', 1.0)):.1%} of pixels kept")
        if "throughput" in cal:
            t = np.asarray(cal["throughput"], dtype=np.float64)
            lines.append(f"throughput (relative to the brightest image): min {t.min():.3f}, "
                         f"mean {t.mean():.3f}")
        planes = self.distinguishable_planes
        finite = planes[np.isfinite(planes)]
        if finite.size:
            lines.append(f"distinguishable depths per sub-position: {finite.min():.1f} to "
                         f"{finite.max():.1f} (median {np.median(finite):.1f}); "
                         f"{planes.size - finite.size} of {planes.size} never decorrelate")
        else:
            lines.append(f"distinguishable depths: planes never decorrelate below 0.5 within "
                         f"the {z * self.depth_step_um:g} um scan at any sub-position")
        lines.append(f"  criterion: {_AXIAL_CRITERION}, per sub-position" + (
            f" (responses binned {self.correlation_binning}x for this figure)"
            if self.correlation_binning > 1 else ""))
        if z > 1:
            neighbour = self.neighbour_ncc.mean(axis=-1)
            lines.append("mean correlation of neighbouring planes, rows i, columns j:")
            lines.extend("  " + " ".join(f"{v:.3f}" for v in row) for row in neighbour[:16, :16])
        if self.files:
            lines.append("report files: " + ", ".join(Path(f).name for f in self.files))
        return "\n".join(lines)

    def write(self, directory: str | Path) -> LensletReport:
        """Write ``summary.txt`` and ``report.json``; return a copy listing them."""
        out = Path(directory)
        out.mkdir(parents=True, exist_ok=True)
        final = replace(self, files=(str(out / "summary.txt"), str(out / "report.json")))
        (out / "report.json").write_text(json.dumps(final.to_dict(), indent=1))
        (out / "summary.txt").write_text(final.summary_text() + "\n")
        return final


def lenslet_report(model: LensletPSF, *, source: str | None = None) -> LensletReport:
    """Measure the depth discrimination of every sub-position of `model`.

    Parameters
    ----------
    model : LensletPSF
        The model; its responses ``psf[:, i, j]`` are the (Z, Y, X) stacks compared.
    source : str, optional
        Bead-scan file to name in the report (default: the model's ``calibration["source"]``).

    Returns
    -------
    LensletReport

    Notes
    -----
    Cost per sub-position: Z forward and Z(Z-1)/2 inverse real FFTs of the padded sensor,
    as the other kinds' report pays once; sensors above 512² pixels are binned first.
    """
    nz, n, _, ny, nx = model.psf.shape
    binning = max(1, math.ceil(math.sqrt(ny * nx / _CORRELATION_PIXELS)))
    ncc = np.empty((n, n, nz, nz))
    axial = np.full((n, n), np.nan)
    for i in range(n):
        for j in range(n):
            ncc[i, j] = depth_correlation(bin_pixels(model.psf[:, i, j], binning))
            _, median = axial_resolution(ncc[i, j], model.geometry.depth_step_um)
            if median is not None:
                axial[i, j] = median
    geometry = model.geometry
    return LensletReport(
        source=source if source is not None else model.calibration.get("source"),
        lenslet_pitch=n, shape_zyx=(nz, ny, nx), depth_step_um=geometry.depth_step_um,
        pixel_size_um=geometry.pixel_size_um, depth_start_um=geometry.depth_start_um,
        depth_ncc=ncc, correlation_binning=binning, axial_resolution_um=axial,
        calibration=dict(model.calibration))
