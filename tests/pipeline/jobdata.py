"""Helpers for the pipeline tests: a tiny job on disk (Gaussian PSF model, raw TIFF video of
drifting beads, job files) and store comparisons."""

from __future__ import annotations

import copy
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

import volrecon

N_FRAMES = 12
SHAPE_ZYX = (3, 24, 24)


def gaussian_psf(shape_zyx: tuple[int, int, int]) -> np.ndarray:
    """A Gaussian blur that widens with depth, each plane summing to 1."""
    nz, ny, nx = shape_zyx
    y, x = np.mgrid[:ny, :nx]
    planes = [np.exp(-((y - ny // 2) ** 2 + (x - nx // 2) ** 2) / (2 * (1.0 + z) ** 2))
              for z in range(nz)]
    psf = np.stack(planes).astype(np.float32)
    return psf / psf.sum(axis=(1, 2), keepdims=True)


def bead_video(model: volrecon.PSFModel, n_frames: int, rng: np.random.Generator
               ) -> np.ndarray:
    """uint16 frames of two beads drifting one pixel every 3 frames, plus camera noise."""
    nz, ny, nx = model.shape_in
    volume = np.zeros(model.shape_in, np.float32)
    volume[0, ny // 3, nx // 3] = 400.0
    volume[nz - 1, 2 * ny // 3, nx // 2] = 300.0
    frames = [model.forward(np.roll(volume, t // 3, axis=2)) for t in range(n_frames)]
    noisy = np.array(frames) + 100.0 + rng.normal(0.0, 2.0, (n_frames, ny, nx))
    return np.clip(noisy, 0, 65535).astype(np.uint16)


DEFAULT_JOB: dict[str, Any] = {
    "model": {"path": "model"},
    "video": {"path": "raw.tif", "dark": "dark.tif"},
    "solver": {"method": "admm", "iterations": 8, "tv": 1e-3, "tol": 0.0,
               "warm_start": True, "chain_frames": 3, "lead_in_frames": 1},
    "output": {"path": "out.zarr", "time_interval_s": 0.05},
    "compute": {"scheduler": "threads", "workers": 2, "frames_per_task": 3},
}


@dataclass
class JobFiles:
    """Files of a tiny job in one folder."""

    folder: Path
    model: volrecon.PSFModel
    raw: np.ndarray
    dark: np.ndarray

    def write_job(self, name: str = "job.toml", **sections: dict[str, Any]) -> Path:
        """Write a job file: DEFAULT_JOB with `sections` merged in (None deletes a key)."""
        document = copy.deepcopy(DEFAULT_JOB)
        for section, values in sections.items():
            target = document.setdefault(section, {})
            for key, value in values.items():
                if value is None:
                    target.pop(key, None)
                else:
                    target[key] = value
        path = self.folder / name
        path.write_bytes(tomli_w.dumps(document).encode())
        return path


def make_job_files(folder: Path, rng: np.random.Generator) -> JobFiles:
    """Model store, N_FRAMES-frame raw TIFF and dark frame in `folder`."""
    import tifffile

    model = volrecon.PSFModel.from_stack(gaussian_psf(SHAPE_ZYX), depth_step_um=2.0,
                                         pixel_size_um=0.65)
    model.save(folder / "model")
    raw = bead_video(model, N_FRAMES, rng)
    tifffile.imwrite(folder / "raw.tif", raw, photometric="minisblack")
    dark = np.full(raw.shape[1:], 100, np.uint16)
    tifffile.imwrite(folder / "dark.tif", dark, photometric="minisblack")
    return JobFiles(folder=folder, model=volrecon.PSFModel.load(folder / "model"),
                    raw=raw, dark=dark)


def chain_reference(frames: np.ndarray, model: volrecon.PSFModel, solver: dict[str, Any], *,
                    chain: int, lead_in: int, failed: frozenset[int] = frozenset(),
                    ) -> dict[int, np.ndarray]:
    """The job's rule written out with volrecon.reconstruct alone: chains ``[c, c + chain)``
    each solved from scratch ``lead_in`` frames before ``c`` (never before frame 0), warm
    start from the previous frame, a fresh start after a failed frame; frames in `failed`
    (non-finite input) are skipped. Returns the stored frames of every chain."""
    volumes: dict[int, np.ndarray] = {}
    for c in range(0, len(frames), chain):
        state = None
        for t in range(max(0, c - lead_in), min(c + chain, len(frames))):
            if t in failed:
                state = None
                continue
            volume, info = volrecon.reconstruct(frames[t], model, init=state, return_info=True,
                                                **solver)
            state = info.state
            if t >= c:
                volumes[t] = volume
    return volumes


def read_volumes(store: Path) -> np.ndarray:
    """The (T, Z, Y, X) image of an output store."""
    import zarr

    return np.asarray(zarr.open_array(store, path="0", mode="r")[...])


def read_store_arrays(store: Path) -> dict[str, np.ndarray]:
    """Every array of a store whose values are deterministic (not timings)."""
    import zarr

    group = zarr.open_group(store, mode="r")
    arrays = {"0": np.asarray(group["0"][...])}
    for name in ("status", "iterations", "objective", "residual", "converged"):
        arrays[f"diagnostics/{name}"] = np.asarray(group[f"diagnostics/{name}"][...])
    if "projections" in group:
        for name in ("max_z", "max_y", "max_x"):
            arrays[f"projections/{name}"] = np.asarray(group[f"projections/{name}"][...])
    return arrays


def assert_bit_identical(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> None:
    """Same arrays, same dtype, same bytes (NaN where NaN)."""
    assert a.keys() == b.keys()
    for key in a:
        assert a[key].dtype == b[key].dtype, key
        if a[key].tobytes() != b[key].tobytes():
            frames = [t for t in range(a[key].shape[0])
                      if a[key][t].tobytes() != b[key][t].tobytes()]
            raise AssertionError(f"{key} differs at frames {frames}")


def sleep_then_pid(seconds: float) -> int:
    """A task for scheduler tests: wait, then say which process ran it."""
    import os
    import time

    time.sleep(seconds)
    return os.getpid()
