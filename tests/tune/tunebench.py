"""A photon-starved recording from the optics bench, for the tuning tests.

The bench is a 64 x 64 diffuser microscope with 8 depth planes (pupil and distances scaled
down from the default design so the PSF fits the small sensor), beads and a fibre at well
under one photo-electron per pixel per frame over a read noise of 1.6 electrons: without
regularisation the noise dominates.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from volrecon.calibrate import calibrate_file
from volrecon.simulate import MicroscopeDesign, Scenario, write_hydrogel_scenario
from volrecon.tune.reference import registered_correlation

#: Small settings for the tests (the defaults are for real data; see volrecon.tune.tune).
QUICK = {"n_sites": 2, "sweep_iterations": 20, "max_iterations": 40,
         "reference_iterations": 60}
JOB_TEXT = """\
[model]
path = "model"

[video]
path = "raw/video.tif"
dark = "raw/dark.tif"

[solver]
iterations = 60
tv = 0.5

[output]
path = "volumes.zarr"
time_interval_s = 0.05

[compute]
scheduler = "threads"
workers = 2
"""


@dataclass(frozen=True)
class Bench:
    """A simulated recording with its calibrated model and a job file."""

    folder: Path
    scenario: Scenario
    job_path: Path

    def truth(self, frame: int) -> np.ndarray:
        """Simulated photons per voxel of video frame `frame`, (Z, Y, X)."""
        return np.load(self.scenario.files["truth_volumes"], mmap_mode="r")[frame]

    def correlation(self, volume: np.ndarray, frame: int) -> float:
        """Blurred correlation with the truth after registration (the calibrated PSF is
        centred by convention, which shifts every reconstruction the same way)."""
        return registered_correlation(volume, np.asarray(self.truth(frame))).correlation


def make_bench(folder: Path, *, seed: int, bead_photons: float, n_frames: int = 10,
               background_photons: float = 0.5) -> Bench:
    """Write a scenario, calibrate its bead scan and write a job file into `folder`."""
    design = MicroscopeDesign(shape_yx=(64, 64), pupil_radius_um=100.0,
                              pupil_to_sensor_um=1000.0)
    scenario = write_hydrogel_scenario(
        folder / "raw", rng=seed, design=design, n_planes=8, n_frames=n_frames, n_beads=10,
        bead_photons=bead_photons, filament_photons_per_um=bead_photons / 10,
        background_photons=background_photons)
    calibrate_file(scenario.files["psf_scan"], folder / "model", depth_step_um=2.0,
                   pixel_size_um=scenario.pixel_size_um,
                   depth_start_um=scenario.depth_start_um, dark_path=scenario.files["dark"])
    job_path = folder / "job.toml"
    job_path.write_text(JOB_TEXT, encoding="utf-8")
    return Bench(folder=folder, scenario=scenario, job_path=job_path)
