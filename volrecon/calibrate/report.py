"""The calibration report: figures of merit as text, JSON and (with matplotlib) PNG plots."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["CalibrationReport"]

_AXIAL_CRITERION = (
    "depth distance at which the normalised cross-correlation between PSF planes (peak over "
    "lateral shifts) first falls below 0.5 - a common-practice criterion, not a standard"
)
_LATERAL_CRITERION = (
    "FWHM of the central peak of the PSF autocorrelation (common practice for coded and "
    "lensless PSFs; for a Gaussian PSF it is sqrt(2) times the PSF's own FWHM)"
)


_NORMALIZATION_TEXT = {
    "stack": "planes scaled together (the brightest to unit sum): relative throughput kept",
    "planes": "planes normalised to unit sum one by one (--normalise-planes)",
    "none": "planes kept in camera counts",
}
_THROUGHPUT_IN_MODEL = {
    "stack": "; kept in the model (plane sums)",
    "planes": "; not in the model (planes normalised one by one), only in its metadata",
    "none": "; in the model as camera counts",
}


@dataclass(frozen=True)
class CalibrationReport:
    """What calibration measured, for people (text, plots) and programs (JSON).

    Arrays are indexed ``[position, plane]`` where they differ per field position; a single
    bead scan has one position.

    Attributes
    ----------
    source : str or None
        The bead-scan file, if calibration started from one.
    model_kind : str
        Kind of the model built (``"depth-convolution"``, ``"depth-low-rank"``,
        ``"field-varying"``).
    shape_zyx : tuple of int
        Volume grid of the model.
    depth_step_um, pixel_size_um, depth_start_um : float
        Model geometry (pixel size after binning).
    wavelength_nm : float or None
        Emission wavelength, if given.
    bin_factor : int
        Lateral binning applied.
    crop_yx : tuple of int or None
        ``(y0, y1, x0, x1)`` window of the raw image used.
    offset_source : str
        ``"dark frame"`` or ``"border estimate"``.
    background : ndarray of shape (K, Z)
        Offset subtracted per plane (0 with a dark frame), counts per raw pixel.
    hot_pixels : int
        Values replaced as hot pixels.
    support_fraction : float
        Fraction of pixel values kept by the background mask (1: no mask).
    plane_sums : ndarray of shape (K, Z)
        Light per plane after cleaning, before normalisation (counts).
    throughput : ndarray of shape (K, Z)
        Plane sums relative to the brightest plane of all positions.
    normalization : {"stack", "planes", "none"}
        How the model's planes were scaled: "stack" keeps `throughput` in the model (each
        plane sums to it), "planes" scales each to unit sum, "none" keeps camera counts.
    singular_values : ndarray
        Singular values of the (Z × pixels) stack matrix (reference position), descending.
    rank : int
        Depth rank of the model (Z for a full-rank model).
    depth_ncc : ndarray of shape (Z, Z)
        Normalised cross-correlation between planes, peak over lateral shifts.
    correlation_binning : int
        Lateral binning applied to the planes for `depth_ncc` only (1: none; large sensors
        are binned to about 512² pixels to bound the cost).
    axial_resolution_per_plane_um : ndarray of shape (Z,)
        Crossing distance per plane (NaN: never below 0.5 in the scanned range).
    axial_resolution_um : float or None
        Median of the above; None when no plane decorrelates within the scan.
    lateral_fwhm_per_plane_um : ndarray of shape (Z,)
        Autocorrelation FWHM per plane.
    registration_shifts_yx : ndarray of shape (K, 2) or None
        Shift applied to each field position's stack to align it with the reference
        position (before centring); None for a single scan.
    reference_position : int or None
        Index of the reference field position.
    position_residuals_yx : ndarray of shape (K, 2) or None
        Measured minus nominal displacement of each position from the reference, pixels.
    plane_drift_yx : ndarray of shape (Z - 1, 2)
        Shift between neighbouring planes of the (reference) scan, measured by phase
        correlation and not corrected (depth-dependent PSF motion is part of the model).
    files : tuple of str
        Files :meth:`write` produced (filled in by :meth:`write`'s caller).
    """

    source: str | None
    model_kind: str
    shape_zyx: tuple[int, int, int]
    depth_step_um: float
    pixel_size_um: float
    depth_start_um: float
    wavelength_nm: float | None
    bin_factor: int
    crop_yx: tuple[int, int, int, int] | None
    offset_source: str
    background: np.ndarray
    hot_pixels: int
    support_fraction: float
    plane_sums: np.ndarray
    throughput: np.ndarray
    normalization: str
    singular_values: np.ndarray
    rank: int
    depth_ncc: np.ndarray
    correlation_binning: int
    axial_resolution_per_plane_um: np.ndarray
    axial_resolution_um: float | None
    lateral_fwhm_per_plane_um: np.ndarray
    registration_shifts_yx: np.ndarray | None
    reference_position: int | None
    position_residuals_yx: np.ndarray | None
    plane_drift_yx: np.ndarray
    files: tuple[str, ...] = field(default=())

    # ------------------------------------------------------------------ derived figures
    @property
    def retained_energy(self) -> float:
        """Fraction of the stack's squared norm kept at the model's rank."""
        power = self.singular_values**2
        total = float(power.sum())
        return float(power[: self.rank].sum() / total) if total > 0 else 1.0

    @property
    def lateral_resolution_um(self) -> float | None:
        """Best (smallest) autocorrelation FWHM over the planes, micrometres."""
        finite = self.lateral_fwhm_per_plane_um[np.isfinite(self.lateral_fwhm_per_plane_um)]
        return float(finite.min()) if finite.size else None

    @property
    def distinguishable_planes(self) -> float | None:
        """Scanned depth range divided by the axial resolution (at least 1)."""
        if self.axial_resolution_um is None:
            return None
        extent = self.shape_zyx[0] * self.depth_step_um
        return max(1.0, extent / self.axial_resolution_um)

    def rank_for_energy(self, energy: float) -> int:
        """Smallest rank keeping `energy` of the squared norm."""
        from volrecon.calibrate.compression import select_rank

        return select_rank(self.singular_values, energy)

    # ------------------------------------------------------------------------ outputs
    def model_metadata(self) -> dict[str, Any]:
        """The compact part saved with the model (no Z × Z matrix)."""
        data = self.to_dict()
        data.pop("depth_ncc")
        data.pop("files")
        return data

    def to_dict(self) -> dict[str, Any]:
        """Everything as JSON-compatible values (NaN written as None)."""
        return {
            "source": self.source,
            "model_kind": self.model_kind,
            "shape_zyx": list(self.shape_zyx),
            "depth_step_um": self.depth_step_um,
            "pixel_size_um": self.pixel_size_um,
            "depth_start_um": self.depth_start_um,
            "wavelength_nm": self.wavelength_nm,
            "bin_factor": self.bin_factor,
            "crop_yx": None if self.crop_yx is None else list(self.crop_yx),
            "offset_source": self.offset_source,
            "background": _json(self.background),
            "hot_pixels": self.hot_pixels,
            "support_fraction": self.support_fraction,
            "plane_sums": _json(self.plane_sums),
            "throughput": _json(self.throughput),
            "normalization": self.normalization,
            "singular_values": _json(self.singular_values),
            "rank": self.rank,
            "retained_energy": self.retained_energy,
            "depth_ncc": _json(self.depth_ncc),
            "correlation_binning": self.correlation_binning,
            "axial_resolution_criterion": _AXIAL_CRITERION,
            "axial_resolution_per_plane_um": _json(self.axial_resolution_per_plane_um),
            "axial_resolution_um": self.axial_resolution_um,
            "lateral_resolution_criterion": _LATERAL_CRITERION,
            "lateral_fwhm_per_plane_um": _json(self.lateral_fwhm_per_plane_um),
            "lateral_resolution_um": self.lateral_resolution_um,
            "registration_shifts_yx": _json(self.registration_shifts_yx),
            "reference_position": self.reference_position,
            "position_residuals_yx": _json(self.position_residuals_yx),
            "plane_drift_yx": _json(self.plane_drift_yx),
            "files": [Path(f).name for f in self.files],
        }

    def summary_text(self) -> str:
        """A few lines a person reads at the end of ``volrecon calibrate``."""
        z, ny, nx = self.shape_zyx
        lines = [
            f"PSF model: {self.model_kind}, {z} planes x {ny} x {nx} px, depth step "
            f"{self.depth_step_um:g} um from {self.depth_start_um:g} um, pixel "
            f"{self.pixel_size_um:g} um" + (f" (binned {self.bin_factor}x)"
                                            if self.bin_factor > 1 else ""),
        ]
        if self.source:
            lines.append(f"source: {self.source}" + (
                f", crop {self.crop_yx[0]}:{self.crop_yx[1]},{self.crop_yx[2]}:{self.crop_yx[3]}"
                if self.crop_yx else ""))
        offsets = self.background[np.isfinite(self.background)]
        offset_text = ("dark frame subtracted" if self.offset_source == "dark frame" else
                       f"border offset subtracted ({offsets.min():.4g} to {offsets.max():.4g} "
                       "counts)")
        lines.append(f"cleaning: {offset_text}; {self.hot_pixels} hot-pixel values replaced; "
                     f"{self.support_fraction:.1%} of pixels kept as PSF support; "
                     + _NORMALIZATION_TEXT[self.normalization])
        t = self.throughput
        lines.append(f"throughput (relative to brightest plane): min {t.min():.3f} at plane "
                     f"{int(np.unravel_index(np.argmin(t), t.shape)[-1])}, mean {t.mean():.3f}"
                     + _THROUGHPUT_IN_MODEL[self.normalization])
        lines.append("  per plane: " + " ".join(f"{v:.3f}" for v in np.ravel(t)[:64])
                     + (" ..." if t.size > 64 else ""))
        for energy in (0.99, 0.999):
            lines.append(f"rank keeping {energy:.1%} of the energy: "
                         f"{self.rank_for_energy(energy)} of {self.singular_values.size}")
        lines.append(f"model rank {self.rank}: retains {self.retained_energy:.5%} of the "
                     "stack's energy")
        if self.axial_resolution_um is None:
            lines.append(f"axial resolution: > {z * self.depth_step_um:g} um (planes never "
                         "decorrelate below 0.5 within the scan)")
        else:
            lines.append(f"axial resolution: {self.axial_resolution_um:.3g} um "
                         f"(~{self.distinguishable_planes:.1f} distinguishable depths in the "
                         "scan)")
            lines.append(f"  distinguishable depths: the {z * self.depth_step_um:g} um scan "
                         "over that distance, i.e. depth slabs whose PSFs decorrelate below "
                         "0.5 (extended objects in neighbouring slabs blur together)")
            lines.append("  not a limit on locating points: an isolated bead is placed in depth "
                         "much more finely, so a localisation check such as 'beads found at "
                         "their depth (+-1 plane)' can be near 100 % with few distinguishable "
                         "depths")
        lines.append(f"  criterion: {_AXIAL_CRITERION}" + (
            f" (planes binned {self.correlation_binning}x for this figure)"
            if self.correlation_binning > 1 else ""))
        lateral = self.lateral_resolution_um
        lines.append("lateral resolution: " + ("undetermined" if lateral is None else
                                                f"{lateral:.3g} um (best plane)"))
        lines.append(f"  criterion: {_LATERAL_CRITERION}")
        if lateral is not None and self.wavelength_nm:
            # Airy disc: FWHM = 0.51 λ / NA (Goodman); the PSF FWHM is taken as the
            # autocorrelation FWHM / sqrt(2) (exact for a Gaussian).
            na = 0.51 * self.wavelength_nm * 1e-3 / (lateral / math.sqrt(2.0))
            lines.append(f"  Airy-equivalent NA at {self.wavelength_nm:g} nm: {na:.3g} "
                         "(0.51 lambda / FWHM, Gaussian approximation)")
        if self.registration_shifts_yx is not None:
            shifts = self.registration_shifts_yx
            lines.append(f"registration: {shifts.shape[0]} field positions aligned on position "
                         f"{self.reference_position}; shifts up to "
                         f"{np.abs(shifts).max():.2f} px")
            if self.position_residuals_yx is not None:
                res = np.linalg.norm(self.position_residuals_yx, axis=1)
                lines.append(f"  measured vs nominal positions: up to {res.max():.2f} px apart")
        drift = np.linalg.norm(self.plane_drift_yx, axis=1) if self.plane_drift_yx.size else None
        if drift is not None:
            lines.append(f"plane-to-plane lateral shift (measured, not corrected): up to "
                         f"{drift.max():.2f} px")
        if self.files:
            lines.append("report files: " + ", ".join(Path(f).name for f in self.files))
        return "\n".join(lines)

    def write(self, directory: str | Path, *, psf_zyx: np.ndarray | None = None
              ) -> CalibrationReport:
        """Write ``summary.txt``, ``report.json`` and, with matplotlib, PNG plots.

        Parameters
        ----------
        directory : str or path
            Folder to write into (created).
        psf_zyx : ndarray of shape (Z, Y, X) or (K, Z, Y, X), optional
            The cleaned PSF planes the model was built from (``Calibration.psf_zyx``); when
            given, ``psf.png`` shows them (the reference position's for several): the
            maximum projection along depth, three planes across the scan and the maximum
            projection along y (an x-z view).

        Returns a copy of this report whose :attr:`files` lists what was written. Without
        matplotlib the PNGs are skipped and ``summary.txt`` says so.
        """
        out = Path(directory)
        out.mkdir(parents=True, exist_ok=True)
        try:
            plots = self._plots(out)
            if psf_zyx is not None:
                plots.insert(0, self._psf_figure(out, psf_zyx))
            note = ""
        except ImportError:
            plots = []
            note = "\n(plots skipped: install matplotlib for the PNG figures)"
        names = tuple(str(p) for p in (out / "summary.txt", out / "report.json", *plots))
        final = replace(self, files=names)
        (out / "report.json").write_text(json.dumps(final.to_dict(), indent=1))
        (out / "summary.txt").write_text(final.summary_text() + note + "\n")
        return final

    def _plots(self, out: Path) -> list[Path]:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        files = []
        depths = self.depth_start_um + self.depth_step_um * np.arange(self.shape_zyx[0])

        fig = Figure(figsize=(9, 3.5))
        ax1, ax2 = fig.subplots(1, 2)
        s = self.singular_values
        ranks = np.arange(1, s.size + 1)
        ax1.semilogy(ranks, np.maximum(s / s[0], 1e-16), "o-", ms=3)
        ax1.axvline(self.rank, color="tab:red", lw=1, label=f"model rank {self.rank}")
        ax1.set(xlabel="rank", ylabel="singular value / largest", title="Singular values")
        ax1.legend()
        kept = np.cumsum(s**2) / max(float(np.sum(s**2)), 1e-300)
        ax2.plot(ranks, 1 - kept + 1e-16, "o-", ms=3)
        ax2.set_yscale("log")
        ax2.axvline(self.rank, color="tab:red", lw=1)
        ax2.set(xlabel="rank", ylabel="energy not retained", title="Truncation loss")
        files.append(_save(fig, FigureCanvasAgg, out / "singular_values.png"))

        fig = Figure(figsize=(5, 3.5))
        ax = fig.subplots()
        for k, row in enumerate(np.atleast_2d(self.throughput)):
            ax.plot(depths, row, "o-", ms=3, label=f"position {k}" if self.throughput.shape[0] > 1
                    else None)
        ax.set(xlabel="depth (um)", ylabel="relative throughput", title="Light per depth",
               ylim=(0, 1.05))
        if self.throughput.shape[0] > 1:
            ax.legend(fontsize="small")
        files.append(_save(fig, FigureCanvasAgg, out / "throughput.png"))

        fig = Figure(figsize=(9, 3.8))
        ax1, ax2 = fig.subplots(1, 2)
        half = 0.5 * self.depth_step_um
        image = ax1.imshow(self.depth_ncc, vmin=0, vmax=1, cmap="viridis", origin="lower",
                           extent=(depths[0] - half, depths[-1] + half,
                                   depths[0] - half, depths[-1] + half))
        fig.colorbar(image, ax=ax1, label="NCC")
        ax1.set(xlabel="depth (um)", ylabel="depth (um)", title="Correlation between depths")
        z = self.shape_zyx[0]
        for i in np.unique(np.linspace(0, z - 1, min(z, 5)).astype(int)):
            ax2.plot(depths - depths[i], self.depth_ncc[i], lw=1, label=f"{depths[i]:g} um")
        ax2.axhline(0.5, color="k", ls="--", lw=1)
        title = ("axial resolution > scan" if self.axial_resolution_um is None
                 else f"axial resolution {self.axial_resolution_um:.3g} um")
        ax2.set(xlabel="depth difference (um)", ylabel="NCC", title=title, ylim=(-0.05, 1.05))
        ax2.legend(fontsize="small")
        files.append(_save(fig, FigureCanvasAgg, out / "depth_correlation.png"))

        fig = Figure(figsize=(5, 3.5))
        ax = fig.subplots()
        ax.plot(depths, self.lateral_fwhm_per_plane_um, "o-", ms=3)
        ax.set(xlabel="depth (um)", ylabel="autocorrelation FWHM (um)",
               title="Lateral resolution per depth")
        files.append(_save(fig, FigureCanvasAgg, out / "lateral_resolution.png"))

        fig = Figure(figsize=(9, 3.5))
        ax1, ax2 = fig.subplots(1, 2)
        if self.plane_drift_yx.size:
            mid = 0.5 * (depths[1:] + depths[:-1])
            ax1.plot(mid, self.plane_drift_yx[:, 0], "o-", ms=3, label="dy")
            ax1.plot(mid, self.plane_drift_yx[:, 1], "s-", ms=3, label="dx")
            ax1.legend()
        ax1.set(xlabel="depth (um)", ylabel="shift (px)", title="Plane-to-plane shift")
        if self.registration_shifts_yx is not None:
            shifts = self.registration_shifts_yx
            ax2.scatter(shifts[:, 1], shifts[:, 0])
            for k, (dy, dx) in enumerate(shifts):
                ax2.annotate(str(k), (dx, dy), fontsize="small")
            ax2.invert_yaxis()
            ax2.set(xlabel="dx (px)", ylabel="dy (px)", title="Field-position registration")
        else:
            ax2.axis("off")
            ax2.text(0.5, 0.5, "single field position:\nno registration", ha="center",
                     va="center", transform=ax2.transAxes)
        files.append(_save(fig, FigureCanvasAgg, out / "registration.png"))
        return files


    def _psf_figure(self, out: Path, psf_zyx: np.ndarray) -> Path:
        """``psf.png``: depth max projection, three planes and an x-z max projection."""
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        stack = np.asarray(psf_zyx, dtype=np.float32)
        if stack.ndim == 4:
            stack = stack[self.reference_position or 0]
        z = stack.shape[0]
        depths = self.depth_start_um + self.depth_step_um * np.arange(z)
        planes = np.unique(np.linspace(0, z - 1, min(z, 3)).round().astype(int))
        ny, nx = stack.shape[1:]
        width_um, height_um = nx * self.pixel_size_um, ny * self.pixel_size_um
        fig = Figure(figsize=(3.0 * (2 + len(planes)), 3.4))
        axes = fig.subplots(1, 2 + len(planes))
        xy = (0.0, width_um, height_um, 0.0)
        views = [(axes[0], stack.max(axis=0), "max over depth", xy, "y (um)", "equal")]
        views += [(ax, stack[i], f"plane {i}: {depths[i]:g} um", xy, "y (um)", "equal")
                  for ax, i in zip(axes[1:-1], planes, strict=True)]
        half = 0.5 * self.depth_step_um
        views.append((axes[-1], stack.max(axis=1), "max over y (x-z view)",
                      (0.0, width_um, depths[-1] + half, depths[0] - half), "depth (um)",
                      "auto"))
        for ax, image, title, extent, ylabel, aspect in views:
            ax.imshow(image, cmap="inferno", extent=extent, aspect=aspect, vmin=0.0,
                      interpolation="nearest")
            ax.set(xlabel="x (um)", ylabel=ylabel, title=title)
        return _save(fig, FigureCanvasAgg, out / "psf.png")


def _save(fig: Any, canvas: Any, path: Path) -> Path:
    fig.tight_layout()
    canvas(fig).print_png(str(path))
    return path


def _json(a: np.ndarray | None) -> Any:
    if a is None:
        return None
    values = np.asarray(a, dtype=np.float64)
    if values.ndim == 0:
        v = float(values)
        return v if math.isfinite(v) else None
    return [_json(row) for row in values]
