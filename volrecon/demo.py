"""``volrecon demo OUTDIR``: the whole job on built-in synthetic data.

Scenario (our own): fluorescent beads and a filament drifting in a hydrogel, imaged by a
diffuser microscope simulated with wave optics (:mod:`volrecon.simulate`), or with
``optics="lenslet"`` by a light-field microscope with a microlens array at the image plane
(:mod:`volrecon.simulate.lenslet`). The demo writes what a camera would — a measured bead-scan
TIFF, dark frames and a raw uint16 video — then runs the same steps a user runs on real data:
calibrate the bead scan into a PSF model, write a job file, run the streaming job into an
OME-Zarr store, and score the volumes against the known truth.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.errors import ConfigError

__all__ = ["OPTICS", "DemoResult", "run_demo"]

MARKER = "volrecon-demo.json"

#: Solver settings of the demo job: unregularised ADMM with warm start and automatic
#: iterations (a chain's cold first frame ~100, warm frames ~8), in chains of 10 frames after
#: 2 lead-in frames, so the 40 frames make 4 tasks for the workers. tv > 0 at these photon
#: levels needs `volrecon tune` to choose the weight (too large a weight erases beads).
SOLVER = {"method": "admm", "iterations": "auto", "tv": 0.0, "l1": 0.0, "tol": 1e-3,
          "warm_start": True, "chain_frames": 10, "lead_in_frames": 2}
#: The lenslet demo's solver: the model is not shift-invariant, so ADMM's exact volume update
#: does not apply; Richardson–Lucy suits its photon-limited frames (see LensletPSF).
LENSLET_SOLVER = {**SOLVER, "method": "rl"}
#: Instruments the demo simulates.
OPTICS = ("diffuser", "lenslet")


@dataclass(frozen=True)
class DemoResult:
    """What the demo made and how well it did.

    Attributes
    ----------
    directory : Path
        OUTDIR.
    job_path, model_path, store_path : Path
        The job file, the calibrated PSF model and the OME-Zarr output.
    frames : int
        Frames reconstructed.
    seconds_per_frame : float
        Wall-clock time of the job divided by the frames this run computed.
    correlation : float
        Mean blurred correlation with the truth (see :class:`volrecon.simulate.scoring.Score`).
    beads_found, beads_total : int
        Beads recovered at their depth (±1 plane), over all frames.
    calibration_summary : str
        The calibration report's text summary.
    """

    directory: Path
    job_path: Path
    model_path: Path
    store_path: Path
    frames: int
    seconds_per_frame: float
    correlation: float
    beads_found: int
    beads_total: int
    calibration_summary: str

    def summary(self) -> str:
        """Text for the terminal: results, then the next commands to try."""
        d = self.directory
        return "\n".join([
            f"volrecon demo: {self.frames} frames reconstructed into {self.store_path}",
            f"  seconds per frame: {self.seconds_per_frame:.2f}",
            f"  correlation with the truth (σ = 1 voxel blur): {self.correlation:.3f}",
            f"  beads found at their depth (±1 plane): {self.beads_found}/{self.beads_total}",
            *([f"  calibration report: {report}/summary.txt"]
              if (report := self.model_path.with_suffix(".report")).is_dir() else []),
            "next:",
            f"  volrecon view {self.store_path}",
            f"  volrecon status {self.store_path}",
            f"  volrecon export {self.store_path} --tiff {d / 'volumes-max.tif'} "
            "--projection max",
            f"  volrecon tune {self.job_path}",
            "Reconstructions are research images, not for diagnosis.",
        ])


def _job_text(scenario: Any, solver: dict[str, Any]) -> str:
    import tomli_w

    job = {
        "model": {"path": "psf-model"},
        "video": {"path": "raw/video.tif", "dark": "raw/dark.tif"},
        "solver": dict(solver),
        "output": {"path": "volumes.zarr", "time_interval_s": float(scenario.frame_interval_s),
                   "max_projections": True},
        "compute": {"scheduler": "threads", "workers": 2, "frames_per_task": 8},
    }
    header = ("# Demo job written by `volrecon demo`: reconstruct raw/video.tif with the model\n"
              "# calibrated from raw/psf_scan.tif. Run it again with `volrecon run job.toml`.\n")
    return header + tomli_w.dumps(job)


def run_demo(directory: str | os.PathLike[str], *, n_frames: int = 40, rng: int = 0,
             optics: str = "diffuser",
             progress: Callable[[Any], None] | None = None) -> DemoResult:
    """Simulate, calibrate, reconstruct and score the demo scenario in `directory`.

    Running it again on the same directory reuses the simulated data and the model and lets
    the job continue (or find nothing left to do).

    Parameters
    ----------
    directory : path-like
        OUTDIR: new, empty, or made by an earlier run of the demo.
    n_frames : int
        Video frames.
    rng : int
        Seed of the simulation.
    optics : {"diffuser", "lenslet"}
        The simulated instrument: a diffuser in the pupil (calibrated with ``volrecon
        calibrate``, solved with ADMM), or a microlens array at the image plane (calibrated
        with ``--lenslet-pitch``, solved with Richardson–Lucy).
    progress : callable, optional
        Receives the job's progress events.

    Raises
    ------
    ConfigError
        If `directory` exists, is not empty and was not made by the demo, was made with
        other optics, or `optics` is unknown.
    """
    import zarr

    from volrecon.calibrate import calibrate_file
    from volrecon.pipeline import load_job, run_job
    from volrecon.simulate import read_scenario, write_hydrogel_scenario
    from volrecon.simulate.scenario import write_lenslet_scenario
    from volrecon.simulate.scoring import score_reconstruction

    if optics not in OPTICS:
        raise ConfigError(f"--optics must be one of {', '.join(OPTICS)}; got {optics!r}")
    out = Path(directory)
    marker = out / MARKER
    if out.exists() and any(out.iterdir()) and not marker.exists():
        raise ConfigError(f"{out}: directory exists and was not made by 'volrecon demo'; "
                          "choose a new or empty directory")
    if marker.exists():
        made = json.loads(marker.read_text()).get("optics", "diffuser")
        if made != optics:
            raise ConfigError(f"{out}: the demo there was made with --optics {made}; run it "
                              f"with --optics {made} or choose a new directory")
    out.mkdir(parents=True, exist_ok=True)
    marker.write_text(json.dumps({"n_frames": n_frames, "rng": rng, "optics": optics}))
    raw = out / "raw"
    if not (raw / "scenario.json").exists():
        write = write_lenslet_scenario if optics == "lenslet" else write_hydrogel_scenario
        write(raw, rng=rng, n_frames=n_frames)
    scenario = read_scenario(raw)
    model_path = out / "psf-model"
    if optics == "lenslet":
        summary = _calibrate_lenslet(scenario, model_path)
    elif not model_path.exists():
        calibration = calibrate_file(
            scenario.files["psf_scan"], model_path, depth_step_um=scenario.depth_step_um,
            pixel_size_um=scenario.pixel_size_um, depth_start_um=scenario.depth_start_um,
            dark_path=scenario.files["dark"])
        summary = calibration.report.summary_text()
    else:
        summary = (model_path.with_suffix(".report") / "summary.txt").read_text()
    job_path = out / "job.toml"
    if not job_path.exists():
        job_path.write_text(_job_text(scenario,
                                      LENSLET_SOLVER if optics == "lenslet" else SOLVER))
    t0 = time.perf_counter()
    result = run_job(load_job(job_path), progress=progress)
    seconds = time.perf_counter() - t0
    volumes = np.asarray(zarr.open_array(zarr.storage.LocalStore(result.store_path), path="0",
                                         mode="r")[...])
    score = score_reconstruction(volumes, np.load(scenario.files["truth_volumes"]),
                                 np.load(scenario.files["truth_positions"]))
    return DemoResult(out, job_path, model_path, out / "volumes.zarr", result.done,
                      seconds / max(result.computed, 1), score.correlation, score.beads_found,
                      score.beads_total, summary)


def _calibrate_lenslet(scenario: Any, model_path: Path) -> str:
    """Calibrate the lenslet bead scan (once) and summarise the model in a few lines."""
    from volrecon.calibrate import calibrate_lenslet_file
    from volrecon.models import PSFModel

    if model_path.exists():
        model = PSFModel.load(model_path)
    else:
        model = calibrate_lenslet_file(
            scenario.files["psf_scan"], model_path,
            lenslet_pitch=scenario.design.lenslet_pitch, depth_step_um=scenario.depth_step_um,
            pixel_size_um=scenario.pixel_size_um, depth_start_um=scenario.depth_start_um,
            dark_path=scenario.files["dark"])
    n = getattr(model, "lenslet_pitch", 0)
    throughput = np.asarray(getattr(model, "calibration", {}).get("throughput", [[1.0]]))
    z, y, x = model.shape_in
    return (f"lenslet model: {n}x{n} sub-positions, {z} planes, {y}x{x} sensor; light per "
            f"sub-position and plane {throughput.min():.2f} to {throughput.max():.2f} of the "
            "brightest\n")
