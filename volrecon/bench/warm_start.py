"""Warm start on the demo video: iterations to reach `tol` from the previous frame vs cold.

Consecutive frames of the demo scenario (beads and a filament drifting in a hydrogel) are
reconstructed twice with the same model and settings: cold (from zero) and warm (from the
previous frame's solver state, as the job does inside a task). The first warm frame has no
predecessor and is left out of the ratio.
"""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.models import PSFModel
from volrecon.solvers import FrameResult, SolverSettings, solve_chain, solve_frame

__all__ = ["run"]


def _demo_frames(directory: Path, n_frames: int) -> tuple[np.ndarray, PSFModel]:
    import tifffile

    from volrecon.calibrate import calibrate_file
    from volrecon.simulate import write_hydrogel_scenario

    scenario = write_hydrogel_scenario(directory, rng=0, n_frames=n_frames)
    calibrate_file(scenario.files["psf_scan"], directory / "model",
                   depth_step_um=scenario.depth_step_um, pixel_size_um=scenario.pixel_size_um,
                   depth_start_um=scenario.depth_start_um, dark_path=scenario.files["dark"])
    video = tifffile.imread(scenario.files["video"]).astype(np.float32)
    dark = tifffile.imread(scenario.files["dark"]).astype(np.float32).mean(axis=0)
    return video - dark, PSFModel.load(directory / "model")


def _iterations(result: FrameResult) -> int:
    if result.info is None:
        raise RuntimeError(f"warm-start benchmark: a demo frame failed ({result.failure})")
    return result.info.iterations


def run(*, n_frames: int = 6, method: str = "admm", tol: float = 1e-3, tv: float = 0.0,
        l1: float = 0.0, threads: int | None = None, max_iterations: int = 2000,
        ) -> dict[str, Any]:
    """Iterations to `tol`, cold and warm, on `n_frames` consecutive demo frames
    (`tv`, `l1` in the units of the dark-subtracted frames and the calibrated model)."""
    with tempfile.TemporaryDirectory() as tmp:
        frames, model = _demo_frames(Path(tmp), n_frames)
    model = model.on_device("cpu", threads=threads)
    settings = SolverSettings(method=method, iterations=max_iterations, tol=tol, tv=tv, l1=l1,
                              chain_frames=len(frames))
    cold = [_iterations(solve_frame(frame, model, settings)) for frame in frames]
    warm = [_iterations(result) for result in solve_chain(frames, model, settings)]
    ratio = float(np.mean(cold[1:]) / np.mean(warm[1:]))
    return {"method": method, "tol": tol, "tv": tv, "l1": l1, "cold_iterations": cold,
            "warm_iterations": warm, "ratio_cold_to_warm": ratio}
