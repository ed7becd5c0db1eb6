"""The tuning report: chosen values and criteria as text and JSON, the sweep as PNG figures.

``summary.txt`` and ``tune.json`` are always written; with matplotlib (the ``report``
extra) also ``sweep.png`` (maximum projections along z of every setting on one frame, the
chosen cell framed), ``scores.png`` (the criteria against tv, one curve per l1),
``iterations.png`` (distance from the converged result against the iteration count),
``noise.png`` (the photon-transfer curve and its fit) and, when ``temporal_weight`` was
swept, ``temporal.png`` (both criteria against the weight).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import InputFileError
from volrecon.tune.criteria import CRITERIA

if TYPE_CHECKING:
    from collections.abc import Callable

    from volrecon.tune.sweep import SweepCell
    from volrecon.tune.temporal import TemporalSweep
    from volrecon.tune.tune import TuneResult

__all__ = ["report_dict", "summary_text", "write_report"]

_CHOSEN_COLOUR = "#e8202a"
#: Flag a chosen cell whose stability value exceeds the sweep's median by this factor.
STEEP_FACTOR = 2.0


def _cell_dict(cell: SweepCell) -> dict[str, Any]:
    return {
        "tv": cell.tv, "l1": cell.l1, "tv_units": cell.tv_units, "l1_units": cell.l1_units,
        "stage": cell.stage, "discrepancy": list(cell.discrepancy),
        "prediction_error": list(cell.prediction_error),
        "reference_correlation": None if cell.reference is None else list(cell.reference),
        "stability": None if math.isnan(cell.stability) else cell.stability,
        "seconds": cell.seconds,
    }


def _temporal_dict(sweep: TemporalSweep | None) -> dict[str, Any] | None:
    if sweep is None:
        return None
    return {
        "chosen": sweep.weight, "lowest_error_weight": sweep.cells[sweep.best_index].weight,
        "unit_operator_norm_squared": sweep.unit, "discrepancy_limit": sweep.discrepancy_limit,
        "run_frames": list(sweep.run_frames), "run_length": sweep.run_length,
        "criterion": CRITERIA["temporal"],
        "cells": [{"weight": c.weight, "weight_units": c.weight_units, "stage": c.stage,
                   "discrepancy": c.discrepancy, "prediction_errors": list(c.prediction_errors),
                   "seconds": c.seconds} for c in sweep.cells],
    }


def report_dict(result: TuneResult) -> dict[str, Any]:
    """Everything the report shows, as JSON-ready values."""
    noise, check, choice = result.noise, result.iterations, result.choice
    return {
        "job": result.job.source,
        "frames": list(result.site_frames),
        "chosen": {"tv": result.tv, "l1": result.l1, "iterations": result.iteration_count,
                   "criterion": choice.criterion, "confirmation": result.confirmation},
        "sweep_choice": _cell_dict(result.cells[choice.index]),
        "no_truth_choice": _cell_dict(result.cells[choice.prediction_index]),
        "morozov_choice": _cell_dict(result.cells[choice.morozov_index]),
        "criteria": CRITERIA,
        "discrepancy_limit": choice.discrepancy_limit,
        "noise": {
            "gain_adu_per_electron": noise.gain_adu_per_electron,
            "gain_stderr": None if math.isnan(noise.gain_stderr) else noise.gain_stderr,
            "mean_read_variance": float(noise.intercept_yx.mean()),
            "dark_frames": noise.dark_frames,
            "expected_residual_energy": [noise.expected_residual_energy(s.frames_3yx[1])
                                         for s in result.sites],
            "model": "EMVA 1288 linear camera: Var = dark variance + gain * signal",
        },
        "weight_unit": result.weight_unit,
        "sweep_iterations": result.sweep_iterations,
        "method": result.job.solver.method,
        "cells": [_cell_dict(c) for c in result.cells],
        "iterations": {
            "counts": list(check.counts), "errors": list(check.errors),
            "cold_errors": list(check.cold_errors), "warm_errors": list(check.warm_errors),
            "reference_iterations": check.reference_iterations,
            "tolerance": check.tolerance, "chain_frames": check.chain_frames,
            "chosen": check.chosen, "within_tolerance": check.within_tolerance,
            "metric": "|G(v_n - v_ref)| / |G v_ref|, G = Gaussian of 1 voxel, chain-weighted",
        },
        "at_chosen_iterations": {"chosen": _cell_dict(result.chosen_check),
                                 "unregularised": _cell_dict(result.baseline_check)},
        "reference": result.reference_path,
        "temporal": _temporal_dict(result.temporal),
        "seconds": result.seconds,
    }


def summary_text(result: TuneResult) -> str:
    """A few lines for people: what was chosen, why, and how it compares."""
    choice, check, noise = result.choice, result.iterations, result.noise
    chosen = result.chosen
    lines = [
        f"job: {result.job.source}",
        f"frames: {', '.join(map(str, result.site_frames))} (each with its neighbours); "
        f"method {result.job.solver.method}, {result.sweep_iterations} iterations per sweep "
        f"reconstruction; {len(result.cells)} settings",
        f"chosen: tv = {result.tv:g}, l1 = {result.l1:g}, iterations = {check.chosen}",
        f"  by {choice.criterion}: {CRITERIA[choice.criterion]}",
        f"  confirmation at {check.chosen} iterations against tv = l1 = 0: "
        f"{result.confirmation}",
        f"  weights in units of u = {result.weight_unit:.4g} (back-projected noise of one "
        f"voxel): tv = {chosen.tv_units:.3g} u, l1 = {chosen.l1_units:.3g} u",
        f"noise: gain {noise.gain_adu_per_electron:.4g} counts/electron"
        + ("" if math.isnan(noise.gain_stderr) else f" (+- {noise.gain_stderr:.2g})")
        + f" by photon transfer; zero-signal variance {float(noise.intercept_yx.mean()):.4g}"
        + (f" from {noise.dark_frames} dark frames" if noise.dark_frames > 1 else
           " fitted (no dark stack)"),
        f"discrepancy (residual / expected noise) of the chosen cell: "
        f"{chosen.mean_discrepancy:.3f}; admissible up to {choice.discrepancy_limit:.3f}",
        f"  {CRITERIA['discrepancy']}",
        f"  Morozov's own choice (most regularised at or below the target): tv = "
        f"{result.cells[choice.morozov_index].tv:.3g}, l1 = "
        f"{result.cells[choice.morozov_index].l1:.3g}",
        f"held-out prediction error of the chosen cell: {chosen.mean_prediction_error:.4g} "
        "per pixel",
        f"  {CRITERIA['prediction']}",
        f"stability of the chosen cell: {chosen.stability:.3g}",
        f"  {CRITERIA['stability']}",
    ]
    values = [c.stability for c in result.cells if math.isfinite(c.stability)]
    if values and math.isfinite(chosen.stability) and \
            chosen.stability > STEEP_FACTOR * float(np.median(values)):
        lines.append(f"  note: the result changes steeply around the chosen setting "
                     f"({chosen.stability:.3g} against a median of {np.median(values):.3g}); "
                     "tune on more frames (--sites) to confirm it")
    if choice.criterion == "reference":
        no_truth = result.cells[choice.prediction_index]
        lines += [f"reference correlation of the chosen cell: {chosen.mean_reference:.3f} "
                  f"({result.reference_path or 'array'})",
                  f"  {CRITERIA['reference']}",
                  f"  without the reference the choice would be tv = {no_truth.tv:.3g}, "
                  f"l1 = {no_truth.l1:.3g} (reference correlation "
                  f"{no_truth.mean_reference:.3f})"]
    lines += _temporal_lines(result.temporal)
    lines.append(
        f"iterations: {check.chosen} is the smallest count within {check.tolerance:g} "
        f"(relative, blurred) of {check.reference_iterations} iterations per frame, on warm "
        f"chains weighted as the job's chains of {check.chain_frames} frames"
        if check.within_tolerance else
        f"iterations: no count up to {check.chosen} came within {check.tolerance:g} of "
        f"{check.reference_iterations} iterations per frame; {check.chosen} is used")
    lines.append("  tried: " + ", ".join(f"{n}: {e:.3f}" for n, e in
                                         zip(check.counts, check.errors, strict=True)))
    c, b = result.chosen_check, result.baseline_check
    line = (f"at {check.chosen} iterations, chosen vs tv = l1 = 0: discrepancy "
            f"{c.mean_discrepancy:.3f} vs {b.mean_discrepancy:.3f}, prediction error "
            f"{c.mean_prediction_error:.4g} vs {b.mean_prediction_error:.4g}")
    if c.reference is not None and b.reference is not None:
        line += f", reference correlation {c.mean_reference:.3f} vs {b.mean_reference:.3f}"
    lines.append(line)
    lines.append(f"time: {result.seconds:.1f} s")
    return "\n".join(lines) + "\n"


def _temporal_lines(sweep: TemporalSweep | None) -> list[str]:
    if sweep is None:
        return []
    lines = [f"temporal_weight: {sweep.weight:g} ({sweep.chosen.weight_units:.3g} |A|^2, |A|^2 = "
             f"{sweep.unit:.4g}) on runs of {sweep.run_length} frames from video frames "
             f"{', '.join(map(str, sweep.run_frames))}",
             f"  {CRITERIA['temporal']}",
             "  weight (|A|^2)   discrepancy   held-out error / pixel"]
    for k, c in enumerate(sweep.cells):
        mark = " <- chosen" if k == sweep.index else (" (lowest error)"
                                                       if k == sweep.best_index else "")
        refused = "" if c.discrepancy <= sweep.discrepancy_limit else " refused"
        lines.append(f"  {c.weight_units:14.3g}   {c.discrepancy:11.3f}   "
                     f"{c.mean_prediction_error:.4g}{refused}{mark}")
    return lines


def write_report(result: TuneResult, directory: str | Path) -> list[Path]:
    """Write ``summary.txt``, ``tune.json`` and (with matplotlib) the PNG figures.

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    InputFileError
        If `directory` exists as a file or cannot be created.
    """
    out = Path(directory)
    if out.exists() and not out.is_dir():
        raise InputFileError(f"{out}: exists and is not a folder; choose another --report")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputFileError(f"{out}: cannot create the report folder ({exc.strerror})") from exc
    text = summary_text(result)
    files = [out / "summary.txt", out / "tune.json"]
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        text += "(plots skipped: install matplotlib for the PNG figures)\n"
        plots: list[Path] = []
    else:
        plots = _plots(result, out)
    files[0].write_text(text, encoding="utf-8")
    files[1].write_text(json.dumps(report_dict(result), indent=2) + "\n", encoding="utf-8")
    return files + plots


# ------------------------------------------------------------------------------------ plots
def _axis_values(cells: list[SweepCell]) -> tuple[list[float], list[float]]:
    tvs = sorted({c.tv_units for c in cells})
    l1s = sorted({c.l1_units for c in cells})
    return tvs, l1s


def _plots(result: TuneResult, out: Path) -> list[Path]:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    cells = list(result.cells)
    chosen = result.chosen
    tvs, l1s = _axis_values(cells)
    site = len(result.sites) // 2
    files = []

    # The grid of maximum projections.
    size = 1.6
    fig = Figure(figsize=(size * len(l1s) + 1.0, size * len(tvs) + 0.9))
    FigureCanvasAgg(fig)
    grid = fig.subplots(len(tvs), len(l1s), squeeze=False)
    lookup = {(c.tv_units, c.l1_units): c for c in cells}
    for i, tv in enumerate(tvs):
        for j, l1 in enumerate(l1s):
            ax = grid[i][j]
            ax.set_xticks([])
            ax.set_yticks([])
            cell = lookup.get((tv, l1))
            if j == 0:
                ax.set_ylabel(f"tv {tv:.3g} u", fontsize=7)
            if i == len(tvs) - 1:
                ax.set_xlabel(f"l1 {l1:.3g} u", fontsize=7)
            if cell is None:
                ax.set_frame_on(False)
                continue
            projection = cell.volumes[site].max(axis=0)
            high = float(np.percentile(projection, 99.9)) or 1.0
            ax.imshow(projection, cmap="magma", vmin=0.0, vmax=high, interpolation="nearest")
            ax.set_title(f"ρ {cell.mean_discrepancy:.3f}  PE {cell.mean_prediction_error:.3g}",
                         fontsize=6)
            if cell is chosen:
                for spine in ax.spines.values():
                    spine.set_edgecolor(_CHOSEN_COLOUR)
                    spine.set_linewidth(3)
    fig.suptitle(f"max projection along z, video frame {result.sites[site].frame}; "
                 f"chosen (red): tv {result.tv:g}, l1 {result.l1:g}; u = "
                 f"{result.weight_unit:.3g}", fontsize=8)
    files.append(_save(fig, out / "sweep.png"))

    # Score curves against tv, one line per l1.
    panels: list[tuple[str, Callable[[SweepCell], float]]] = [
        ("discrepancy ρ", lambda c: c.mean_discrepancy),
        ("prediction error / pixel", lambda c: c.mean_prediction_error),
        ("stability (relative change)", lambda c: c.stability)]
    if chosen.reference is not None:
        panels.append(("reference correlation", lambda c: c.mean_reference or math.nan))
    fig = Figure(figsize=(3.6 * len(panels), 3.4))
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    smallest = min((t for t in tvs if t > 0), default=1.0)
    for ax, (name, value) in zip(axes, panels, strict=True):
        for l1 in l1s:
            line = sorted((c.tv_units, value(c)) for c in cells if c.l1_units == l1)
            if line:
                ax.plot([x for x, _ in line], [y for _, y in line], "o-", ms=3,
                        label=f"l1 {l1:.3g} u")
        ax.plot([chosen.tv_units], [value(chosen)], "s", ms=9, mfc="none",
                mec=_CHOSEN_COLOUR, mew=2, label="chosen")
        ax.set_xscale("symlog", linthresh=smallest)
        ax.set_xlabel("tv (units of u)")
        ax.set_title(name, fontsize=9)
        finite = [value(c) for c in cells if math.isfinite(value(c))]
        if name.startswith("prediction") and finite and min(finite) > 0:
            ax.set_yscale("log")
        if name.startswith("discrepancy"):
            ax.axhline(1.0, color="0.5", lw=0.8, ls="--")
            ax.axhline(result.choice.discrepancy_limit, color=_CHOSEN_COLOUR, lw=0.8, ls=":")
    axes[0].legend(fontsize=6)
    fig.tight_layout()
    files.append(_save(fig, out / "scores.png"))

    # Iterations.
    check = result.iterations
    fig = Figure(figsize=(5.0, 3.5))
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    ax.plot(check.counts, check.errors, "o-", label="job-weighted")
    ax.plot(check.counts, check.cold_errors, ".--", label="first (cold) frame")
    ax.plot(check.counts, check.warm_errors, ".--", label="warm frames")
    ax.axhline(check.tolerance, color="0.5", ls=":", label=f"tolerance {check.tolerance:g}")
    ax.axvline(check.chosen, color=_CHOSEN_COLOUR, lw=1, label=f"chosen {check.chosen}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("iterations per frame")
    ax.set_ylabel(f"change from {check.reference_iterations} iterations")
    ax.legend(fontsize=7)
    fig.tight_layout()
    files.append(_save(fig, out / "iterations.png"))

    # Photon transfer.
    noise = result.noise
    transfer = noise.transfer
    fig = Figure(figsize=(5.0, 3.5))
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    if transfer.mean.size:
        ax.plot(transfer.mean, transfer.variance, "o", ms=4, label="frames (second differences)")
        x = np.linspace(min(0.0, float(transfer.mean.min())), float(transfer.mean.max()), 50)
        ax.plot(x, float(np.mean(transfer.intercept)) + noise.gain_adu_per_electron * x, "-",
                label=f"fit: gain {noise.gain_adu_per_electron:.3g}")
    ax.set_xlabel("mean signal (counts, times slope factor)")
    ax.set_ylabel("variance (counts²)")
    ax.set_title("photon transfer (EMVA 1288); bins by the noisy mean flatten at the ends,\n"
                 "the gain comes from unbiased sums over all pixels", fontsize=8)
    ax.legend(fontsize=7)
    fig.tight_layout()
    files.append(_save(fig, out / "noise.png"))
    if result.temporal is not None:
        files.append(_temporal_plot(result.temporal, out / "temporal.png"))
    return files


def _temporal_plot(sweep: TemporalSweep, path: Path) -> Path:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.2, 3.4))
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 2)
    x = [c.weight_units for c in sweep.cells]
    smallest = min((w for w in x if w > 0), default=1.0)
    for ax, name, y in ((axes[0], "discrepancy ρ (kept frames)",
                         [c.discrepancy for c in sweep.cells]),
                        (axes[1], "held-out error / pixel (odd frames)",
                         [c.mean_prediction_error for c in sweep.cells])):
        ax.plot(x, y, "o-", ms=3)
        ax.plot([x[sweep.index]], [y[sweep.index]], "s", ms=9, mfc="none",
                mec=_CHOSEN_COLOUR, mew=2, label="chosen")
        ax.set_xscale("symlog", linthresh=smallest)
        ax.set_xlabel("temporal_weight (units of |A|²)")
        ax.set_title(name, fontsize=9)
    axes[0].axhline(sweep.discrepancy_limit, color=_CHOSEN_COLOUR, lw=0.8, ls=":")
    axes[1].legend(fontsize=7)
    fig.tight_layout()
    return _save(fig, path)


def _save(fig: Any, path: Path) -> Path:
    fig.savefig(path, dpi=110)
    return path
