"""The temporal prior on a dim, slowly drifting video, and across a cut between two scenes.

``volrecon bench --temporal`` simulates beads and a fibre in a hydrogel at 1/16 of the demo's
photons and 1/4 of its drift (our own bench scenario), calibrates the bead scan, and compares
per-frame ADMM (best ``l1`` of a small grid) with windows of ``temporal_window`` frames (best
``temporal_weight`` of a grid, in units of ‖A‖²), both chosen against the truth (oracle
tuning, which only a simulation allows; ``volrecon tune`` chooses without it). Both run the
same fixed iterations, so the cost ratio is per iteration. A second video joins the first
half of that video to the first half of an unrelated scene (another seed): the frames next to
the cut show whether the prior smears across a real change.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.models import PSFModel
from volrecon.solvers import SolverSettings, solve_chain

__all__ = ["run"]

#: Photons and drift relative to the demo scenario.
PHOTON_FRACTION = 1 / 16
DRIFT_FRACTION = 1 / 4
L1_GRID = (0.0, 0.003, 0.01)  # × frame peak
WEIGHT_GRID = (0.003, 0.01, 0.03, 0.1)  # × ‖A‖²


def _scene(directory: Path, seed: int, n_frames: int) -> tuple[np.ndarray, np.ndarray, Path]:
    import tifffile

    from volrecon.calibrate import calibrate_file
    from volrecon.simulate import write_hydrogel_scenario

    scenario = write_hydrogel_scenario(
        directory, rng=seed, n_frames=n_frames, bead_photons=2e6 * PHOTON_FRACTION,
        filament_photons_per_um=2e5 * PHOTON_FRACTION,
        drift_zyx_um_per_s=(0.4 * DRIFT_FRACTION, 1.6 * DRIFT_FRACTION,
                            -1.2 * DRIFT_FRACTION))
    model_path = directory / "model"
    calibrate_file(scenario.files["psf_scan"], model_path,
                   depth_step_um=scenario.depth_step_um, pixel_size_um=scenario.pixel_size_um,
                   depth_start_um=scenario.depth_start_um, dark_path=scenario.files["dark"])
    video = tifffile.imread(scenario.files["video"]).astype(np.float32)
    dark = tifffile.imread(scenario.files["dark"]).astype(np.float32).mean(axis=0)
    return video - dark, np.load(scenario.files["truth_volumes"]), model_path


def _scores(frames: np.ndarray, truth: np.ndarray, model: PSFModel,
            settings: SolverSettings) -> tuple[np.ndarray, float]:
    from volrecon.simulate.scoring import blurred_correlation

    t0 = time.perf_counter()
    scores = []
    for t, result in enumerate(solve_chain(frames, model, settings)):
        if result.volume is None:
            raise RuntimeError(f"temporal benchmark: frame {t} failed ({result.failure})")
        scores.append(blurred_correlation(result.volume, truth[t]))
    return np.array(scores), time.perf_counter() - t0


def run(*, n_frames: int = 24, window: int = 8, iterations: int = 40,
        threads: int | None = 1) -> dict[str, Any]:
    """Tuned per-frame vs tuned temporal on the dim video, and both across a cut."""
    with tempfile.TemporaryDirectory() as tmp:
        frames, truth, model_path = _scene(Path(tmp) / "a", 9, n_frames)
        other, other_truth, _ = _scene(Path(tmp) / "b", 10, n_frames)
        model = PSFModel.load(model_path).on_device("cpu", threads=threads)
    peak = float(frames.max())
    gain = model.operator_norm_squared()

    def settings(**kw: Any) -> SolverSettings:
        return SolverSettings(method="admm", iterations=iterations, tol=0.0,
                              chain_frames=n_frames, lead_in_frames=0, **kw)

    per_frame = {l1: _scores(frames, truth, model, settings(l1=l1 * peak)) for l1 in L1_GRID}
    best_l1 = max(per_frame, key=lambda k: per_frame[k][0].mean())
    temporal = {w: _scores(frames, truth, model,
                           settings(l1=best_l1 * peak, temporal_window=window,
                                    temporal_weight=w * gain)) for w in WEIGHT_GRID}
    best_w = max(temporal, key=lambda k: temporal[k][0].mean())
    half = n_frames // 2
    cut_frames = np.concatenate([frames[:half], other[:half]])
    cut_truth = np.concatenate([truth[:half], other_truth[:half]])
    alone, _ = _scores(cut_frames, cut_truth, model, settings(l1=best_l1 * peak))
    joint, _ = _scores(cut_frames, cut_truth, model,
                       settings(l1=best_l1 * peak, temporal_window=window,
                                temporal_weight=best_w * gain))
    near = [half - 1, half]
    # The cost ratio: the same settings timed back to back, twice, the faster of each.
    frame_s = min(per_frame[best_l1][1], _scores(frames, truth, model,
                                                 settings(l1=best_l1 * peak))[1])
    window_s = min(temporal[best_w][1], _scores(
        frames, truth, model, settings(l1=best_l1 * peak, temporal_window=window,
                                       temporal_weight=best_w * gain))[1])
    return {
        "frames": n_frames, "window": window, "iterations": iterations,
        "photon_fraction": PHOTON_FRACTION, "drift_fraction": DRIFT_FRACTION,
        "per_frame": {str(k): float(v[0].mean()) for k, v in per_frame.items()},
        "temporal": {str(k): float(v[0].mean()) for k, v in temporal.items()},
        "best_l1_x_peak": best_l1, "best_weight_x_norm": best_w,
        "gain": float(temporal[best_w][0].mean() / per_frame[best_l1][0].mean()),
        "cost_ratio": float(window_s / frame_s),
        "cut_frames": near,
        "cut_per_frame": [float(alone[t]) for t in near],
        "cut_temporal": [float(joint[t]) for t in near],
        "cut_loss": float(1 - np.mean(joint[near]) / np.mean(alone[near])),
    }


def print_report(r: dict[str, Any]) -> None:
    """The figures of :func:`run` beside their targets."""
    print(f"temporal prior on a dim drifting video ({r['frames']} frames, "
          f"{r['photon_fraction']:g} of the demo's photons, {r['drift_fraction']:g} of its "
          f"drift; {r['iterations']} ADMM iterations, windows of {r['window']}):")
    print("  per frame, l1 (x peak) -> correlation: " + ", ".join(
        f"{k}: {v:.3f}" for k, v in r["per_frame"].items()))
    print(f"  temporal, l1 {r['best_l1_x_peak']:g} x peak, weight (x |A|^2) -> correlation: "
          + ", ".join(f"{k}: {v:.3f}" for k, v in r["temporal"].items()))
    print(f"  gain of the tuned prior: {r['gain']:.2f}x (target >= 1.15, aim 1.3) at "
          f"{r['cost_ratio']:.2f}x the time per frame (target <= 1.3)")
    print(f"  across a cut (frames {r['cut_frames']}): per frame "
          f"{', '.join(f'{v:.3f}' for v in r['cut_per_frame'])}, temporal "
          f"{', '.join(f'{v:.3f}' for v in r['cut_temporal'])}: loss "
          f"{100 * r['cut_loss']:.1f} % (target <= 5 %)")
