"""Sample data: beads and a fibre drifting in a hydrogel, simulated and reconstructed.

Built on demand (a few seconds) from :func:`volrecon.simulate.write_hydrogel_scenario` in a
temporary folder; needs no napari or Qt.
"""

from __future__ import annotations

import tempfile
from typing import TYPE_CHECKING

import numpy as np

from volrecon.napari.stores import VOLUME_COLORMAP

if TYPE_CHECKING:
    from volrecon.napari.stores import LayerData

__all__ = ["hydrogel_sample"]


def hydrogel_sample(*, n_frames: int = 12, n_planes: int = 12, iterations: int = 40,
                    seed: int = 0) -> list[LayerData]:
    """Simulate a short hydrogel recording and reconstruct it frame by frame.

    Parameters
    ----------
    n_frames, n_planes : int
        Video length and depth planes of the simulated microscope (128 × 128 sensor).
    iterations : int
        ADMM iterations per frame; each frame starts from the previous one's solution.
    seed : int
        Seed of the simulation (the same seed gives the same sample).

    Returns
    -------
    list of (data, kwargs, "image")
        The reconstruction ``(T, Z, Y, X)`` in photons per voxel, the raw video in camera
        counts as ``(T, 1, Y, X)`` (its one plane stretched over the depth range, hidden) and
        the simulated truth ``(T, Z, Y, X)`` (hidden), all with the scenario's frame interval
        (s) and voxel size (µm).
    """
    import tifffile

    from volrecon import PSFModel, reconstruct
    from volrecon.simulate import write_hydrogel_scenario

    with tempfile.TemporaryDirectory(prefix="volrecon-sample-") as folder:
        scenario = write_hydrogel_scenario(folder, rng=seed, n_frames=n_frames,
                                           n_planes=n_planes)
        video = tifffile.imread(scenario.files["video"])
        dark = tifffile.imread(scenario.files["dark"]).mean(axis=0, dtype=np.float64)
        truth = np.load(scenario.files["truth_volumes"])
        psf = np.load(scenario.files["truth_psf"])
    model = PSFModel.from_stack(psf, scenario.depth_step_um, scenario.pixel_size_um,
                                scenario.depth_start_um)
    camera = scenario.camera
    # Counts -> photons: E[y] = offset + K (η μ_p + μ_d); the dark mean holds offset + K μ_d.
    counts_per_photon = camera.gain_adu_per_electron * camera.quantum_efficiency
    volumes = np.empty((n_frames, *model.shape_in), dtype=np.float32)
    state = None
    for t in range(n_frames):
        photons = ((video[t] - dark) / counts_per_photon).astype(np.float32)
        volumes[t], info = reconstruct(photons, model, method="admm", iterations=iterations,
                                       init=state, return_info=True)
        state = info.state
    dt, dz, px = scenario.frame_interval_s, scenario.depth_step_um, scenario.pixel_size_um
    z0 = scenario.depth_start_um
    units4 = ["second", "micrometer", "micrometer", "micrometer"]
    labels4 = ["t", "z", "y", "x"]
    high = float(np.percentile(volumes.max(axis=(1, 2, 3)), 50)) or 1.0
    return [
        (volumes, {"name": "hydrogel reconstruction", "scale": [dt, dz, px, px],
                   "translate": [0.0, z0, 0.0, 0.0], "axis_labels": labels4, "units": units4,
                   "contrast_limits": (0.0, high), "colormap": VOLUME_COLORMAP,
                   "blending": "additive"}, "image"),
        (video[:, None], {"name": "hydrogel raw video", "scale": [dt, n_planes * dz, px, px],
                          "translate": [0.0, z0 + (n_planes - 1) * dz / 2, 0.0, 0.0],
                          "axis_labels": labels4, "units": units4, "visible": False}, "image"),
        (truth, {"name": "hydrogel truth", "scale": [dt, dz, px, px],
                 "translate": [0.0, z0, 0.0, 0.0], "axis_labels": labels4, "units": units4,
                 "colormap": "gray", "blending": "additive", "visible": False}, "image"),
    ]
