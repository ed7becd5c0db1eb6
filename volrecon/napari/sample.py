"""Sample data: beads and a fibre drifting in a hydrogel, simulated and reconstructed.

Two samples of the scenario of :func:`volrecon.simulate.write_hydrogel_scenario`; neither
needs napari or Qt:

- :func:`hydrogel_sample`: a short video reconstructed in memory with the simulated PSF
  (a few seconds);
- :func:`demo_sample`: the whole ``volrecon demo`` (bead scan calibrated into a model, a
  streaming job into an OME-Zarr store) in a cache folder, opened lazily like any store.
  The first call takes about half a minute; later calls reuse the folder.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.napari.stores import VOLUME_COLORMAP, model_store_layers, output_store_layers

if TYPE_CHECKING:
    from volrecon.napari.stores import LayerData

__all__ = ["demo_sample", "hydrogel_sample", "sample_cache_folder"]

_UNITS4 = ["second", "micrometer", "micrometer", "micrometer"]
_LABELS4 = ["t", "z", "y", "x"]


def _video_layer(video_tyx: Any, dt: float, dz: float, z0: float, px: float, n_planes: int,
                 name: str) -> LayerData:
    """Raw frames as ``(T, 1, Y, X)``, their one plane stretched over the depth range."""
    return (video_tyx[:, None], {
        "name": name, "scale": [dt, n_planes * dz, px, px],
        "translate": [0.0, z0 + (n_planes - 1) * dz / 2, 0.0, 0.0],
        "axis_labels": _LABELS4, "units": _UNITS4, "visible": False}, "image")


def _truth_layer(truth_tzyx: Any, dt: float, dz: float, z0: float, px: float,
                 name: str) -> LayerData:
    return (truth_tzyx, {
        "name": name, "scale": [dt, dz, px, px], "translate": [0.0, z0, 0.0, 0.0],
        "axis_labels": _LABELS4, "units": _UNITS4, "colormap": "gray", "blending": "additive",
        "visible": False}, "image")


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

    from volrecon import PSFModel
    from volrecon.simulate import write_hydrogel_scenario
    from volrecon.solvers import SolverSettings, solve_chain

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
    photons = ((video - dark) / counts_per_photon).astype(np.float32)
    settings = SolverSettings(method="admm", iterations=iterations, chain_frames=n_frames)
    volumes = np.full((n_frames, *model.shape_in), np.nan, dtype=np.float32)
    for t, result in enumerate(solve_chain(photons, model, settings)):
        if result.volume is not None:
            volumes[t] = result.volume
    dt, dz, px = scenario.frame_interval_s, scenario.depth_step_um, scenario.pixel_size_um
    z0 = scenario.depth_start_um
    high = float(np.percentile(volumes.max(axis=(1, 2, 3)), 50)) or 1.0
    return [
        (volumes, {"name": "hydrogel reconstruction", "scale": [dt, dz, px, px],
                   "translate": [0.0, z0, 0.0, 0.0], "axis_labels": _LABELS4, "units": _UNITS4,
                   "contrast_limits": (0.0, high), "colormap": VOLUME_COLORMAP,
                   "blending": "additive"}, "image"),
        _video_layer(video, dt, dz, z0, px, n_planes, "hydrogel raw video"),
        _truth_layer(truth, dt, dz, z0, px, "hydrogel truth"),
    ]


def sample_cache_folder() -> Path:
    """Where :func:`demo_sample` keeps its demo: ``$XDG_CACHE_HOME/volrecon/napari-demo``
    (``~/.cache`` when unset)."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "volrecon" / "napari-demo"


def demo_sample(*, directory: str | os.PathLike[str] | None = None,
                n_frames: int = 12) -> list[LayerData]:
    """Run (or reuse) ``volrecon demo`` and open its results lazily.

    Parameters
    ----------
    directory : str or path, optional
        The demo folder; default :func:`sample_cache_folder`. A finished demo there is
        reused (the job finds nothing left to do).
    n_frames : int
        Frames of a new demo.

    Returns
    -------
    list of (data, kwargs, "image")
        The output store's layers (volumes, then hidden projections), the calibrated PSF
        model's layers, the raw video and the simulated truth (hidden), in one world.
    """
    import tifffile

    from volrecon.demo import run_demo
    from volrecon.simulate import read_scenario

    result = run_demo(directory or sample_cache_folder(), n_frames=n_frames)
    scenario = read_scenario(result.directory / "raw")
    layers = output_store_layers(result.store_path)
    for data, kwargs, kind in model_store_layers(result.model_path):
        layers.append((data, {**kwargs, "name": f"demo {kwargs['name']}", "visible": False},
                       kind))
    dt, dz, px = scenario.frame_interval_s, scenario.depth_step_um, scenario.pixel_size_um
    z0, n_planes = scenario.depth_start_um, scenario.shape_zyx[0]
    video = tifffile.imread(scenario.files["video"])
    truth = np.load(scenario.files["truth_volumes"], mmap_mode="r")
    layers.append(_video_layer(video, dt, dz, z0, px, n_planes, "demo raw video"))
    layers.append(_truth_layer(truth, dt, dz, z0, px, "demo truth"))
    return layers
