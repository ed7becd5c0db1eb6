"""Files, size, napari opening time and bytes per time step of a long output store.

A store of `n_frames` frames is written as a job writes it (:class:`JobStore` and the tasks'
shard writers; the volumes are a smooth synthetic bead field, so they compress like real
ones), once sharded and once with one file per chunk. For each the figures are: files, bytes,
seconds to open it in a headless napari viewer (the plugin's reader and ``add_image``; the
first opening of each layout in the process is reported apart, as it pays for imports), and
the bytes this process reads (Linux ``/proc/self/io`` ``rchar``) and seconds for one step of
the time slider, against the size of one shard file.
"""

from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["report_lines", "run", "write_store"]


def _volumes(n_frames: int, shape_zyx: tuple[int, int, int]) -> Any:
    """Frames of a few Gaussian beads drifting one pixel per frame (a generator)."""
    nz, ny, nx = shape_zyx
    z, y, x = np.mgrid[:nz, :ny, :nx].astype(np.float32)
    rng = np.random.default_rng(7)
    beads = rng.uniform(0, 1, (12, 3)) * np.array([nz, ny, nx])
    for t in range(n_frames):
        volume = np.zeros(shape_zyx, np.float32)
        for bz, by, bx in beads:
            volume += np.exp(-((z - bz) ** 2 + (y - by) ** 2 + (x - (bx + t) % nx) ** 2) / 4.0)
        yield volume


def write_store(path: Path, n_frames: int, shape_zyx: tuple[int, int, int],
                shard_frames: int) -> float:
    """Write a finished store of synthetic frames as a job's tasks do; seconds taken."""
    from volrecon.io.ome_zarr import downsample_yx, pyramid_levels
    from volrecon.pipeline.shards import FrameWriter
    from volrecon.pipeline.store import STATUS_DONE, FrameRecords, JobStore, max_projections

    levels = pyramid_levels(shape_zyx[1:])
    store = JobStore.create(path, shape_zyx=shape_zyx, n_frames=n_frames,
                            scale_tzyx=(0.033, 2.0, 0.65, 0.65), metadata={},
                            projections=True, shard_frames=shard_frames, levels=levels)
    started = time.perf_counter()
    writers = {name: FrameWriter(os.fspath(path), array)
               for name, array in store.frame_arrays().items()}
    for t, volume in enumerate(_volumes(n_frames, shape_zyx)):
        writers["0"].write(t, volume)
        level = volume
        for k in range(1, levels):
            level = downsample_yx(level)
            writers[str(k)].write(t, level)
        for name, projected in max_projections(volume).items():
            writers[f"projections/{name}"].write(t, projected)
    for writer in writers.values():
        writer.check_written()
    n = n_frames
    store.record(FrameRecords(start=0, stop=n, failures={},
                              iterations=np.ones(n, np.int32), objective=np.zeros(n),
                              residual=np.zeros(n), converged=np.ones(n, bool),
                              seconds=np.zeros(n, np.float32),
                              status=np.full(n, STATUS_DONE, np.uint8)))
    return time.perf_counter() - started


def _rchar() -> int:
    for line in Path("/proc/self/io").read_text().splitlines():
        if line.startswith("rchar"):
            return int(line.split()[1])
    return 0  # pragma: no cover - not Linux


def _measure(path: Path) -> dict[str, float]:
    import napari

    from volrecon.napari.stores import output_store_layers

    viewer = napari.Viewer(show=False)
    try:
        viewer.add_image(np.zeros((2, 8, 8), np.float32))  # Qt and OpenGL start-up, not timed
        return _steps(path, viewer, output_store_layers)
    finally:
        viewer.close()


def _steps(path: Path, viewer: Any, output_store_layers: Any) -> dict[str, float]:
    started = time.perf_counter()
    layers = output_store_layers(path)
    data, kwargs, _kind = layers[0]
    layer = viewer.add_image(data, **kwargs)
    open_s = time.perf_counter() - started
    full = layer.data[0] if layer.multiscale else layer.data  # full resolution
    frames = full.shape[0]
    steps, bytes_read = [], []
    for t in (frames // 3, frames // 3 + 1, frames // 3 + 2):
        before, started = _rchar(), time.perf_counter()
        viewer.dims.set_current_step(0, t)
        np.asarray(full[t])  # what the slider step draws (headless: no paint event)
        steps.append(time.perf_counter() - started)
        bytes_read.append(_rchar() - before)
    return {"open_seconds": open_s, "step_seconds": float(np.median(steps)),
            "step_bytes": float(np.median(bytes_read))}


def run(*, n_frames: int = 1000, size_zyx: tuple[int, int, int] = (16, 128, 128),
        shard_frames: int = 32) -> dict[str, Any]:
    """Write the store both ways and measure it; figures in a dict."""
    from volrecon.pipeline.shards import shard_file
    from volrecon.pipeline.store import JobStore

    report: dict[str, Any] = {"frames": n_frames, "size_zyx": list(size_zyx),
                              "shard_frames": shard_frames, "layouts": {}}
    with tempfile.TemporaryDirectory() as tmp:
        for name, frames_per_file in (("sharded", shard_frames), ("one file per chunk", 1)):
            path = Path(tmp) / f"{frames_per_file}.zarr"
            write_s = write_store(path, n_frames, size_zyx, frames_per_file)
            files = [p for p in path.rglob("*") if p.is_file()]
            first = _measure(path)  # the process's first use of this layout: imports
            entry = {"files": len(files), "bytes": sum(p.stat().st_size for p in files),
                     "write_seconds": write_s, **_measure(path),
                     "first_open_seconds": first["open_seconds"]}
            if frames_per_file > 1:
                entry["shard_file_bytes"] = shard_file(
                    path, JobStore.open(path).image, 0).stat().st_size
            report["layouts"][name] = entry
    return report


def report_lines(report: dict[str, Any]) -> list[str]:
    """The figures as lines for the terminal."""
    z, y, x = report["size_zyx"]
    lines = [f"store of {report['frames']} frames of {z}x{y}x{x} with projections and the "
             "default resolution levels:"]
    for name, r in report["layouts"].items():
        shard = (f", a shard file {r['shard_file_bytes'] / 1e6:.2f} MB"
                 if "shard_file_bytes" in r else "")
        lines.append(
            f"  {name:>18}: {r['files']} files, {r['bytes'] / 1e9:.3f} GB, written in "
            f"{r['write_seconds']:.1f} s; opens in napari in {r['open_seconds']:.2f} s "
            f"(first time in the process {r['first_open_seconds']:.2f} s); a time "
            f"step reads {r['step_bytes'] / 1e6:.3f} MB in {r['step_seconds'] * 1e3:.0f} ms"
            f"{shard}")
    from volrecon.pipeline.store import store_file_count

    per_frame = report["layouts"]["sharded"]["bytes"] / report["frames"]
    from volrecon.io.ome_zarr import pyramid_levels

    levels = pyramid_levels((y, x))
    files = {n: store_file_count(108_000, (z, y, x), shard_frames=n, projections=True,
                                 levels=levels) for n in (report["shard_frames"], 1)}
    lines.append(f"  one hour of 30 fps (108000 frames): about {per_frame * 108000 / 1e9:.0f} GB "
                 f"in {files[report['shard_frames']]} files sharded ({files[1]} unsharded)")
    return lines
