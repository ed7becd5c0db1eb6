"""Benchmark of the streaming job: memory does not grow with the video, workers add throughput.

Prints (not a test):
- peak resident memory of a run over N frames and over 10 N frames (each in a fresh process,
  threaded scheduler, so one process holds everything), and their ratio;
- frames per second with 1 and with 2 workers on the same job, and the speed-up (time from
  the start of computing to the last task, so store creation and start-up are left out).

Usage::

    .venv/bin/python benchmarks/pipeline_memory.py [--frames 16] [--factor 10]
        [--size 16 128 128] [--iterations 10] [--json]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

_CHILD = r"""
import json, sys, time
from volrecon.bench.memory import process_peak_rss_bytes
from volrecon.pipeline import load_job, run_job
job = load_job(sys.argv[1]).with_compute(workers=int(sys.argv[2]))
events = []
result = run_job(job, progress=events.append)
print(json.dumps({"frames": result.total, "seconds": result.seconds,
                  "frames_per_second": events[-1].frames_per_second,  # compute time only
                  "peak_rss_mib": process_peak_rss_bytes() / 2**20}))
"""


def _make_job(folder: Path, *, n_frames: int, size_zyx: tuple[int, int, int],
              iterations: int, name: str, rng: np.random.Generator) -> Path:
    import tifffile
    import tomli_w

    import volrecon

    if not (folder / "model").exists():
        nz, ny, nx = size_zyx
        y, x = np.mgrid[:ny, :nx]
        psf = np.stack([np.exp(-((y - ny // 2) ** 2 + (x - nx // 2) ** 2) / (2 * (1.0 + z) ** 2))
                        for z in range(nz)]).astype(np.float32)
        psf /= psf.sum(axis=(1, 2), keepdims=True)
        volrecon.PSFModel.from_stack(psf, depth_step_um=2.0, pixel_size_um=0.65).save(
            folder / "model")
    model = volrecon.PSFModel.load(folder / "model")
    volume = np.zeros(model.shape_in, np.float32)
    points = rng.integers(0, np.array(model.shape_in), size=(20, 3))
    volume[tuple(points.T)] = 500.0
    with tifffile.TiffWriter(folder / f"{name}.tif", bigtiff=True) as writer:
        for t in range(n_frames):  # streamed: the video is never held in memory here either
            frame = model.forward(np.roll(volume, t // 4, axis=2)) + rng.normal(
                0, 2.0, model.shape_out)
            writer.write(np.clip(frame + 100, 0, 65535).astype(np.uint16),
                         photometric="minisblack", contiguous=True)
    document = {
        "model": {"path": "model"},
        "video": {"path": f"{name}.tif"},
        "solver": {"method": "admm", "iterations": iterations, "tv": 1e-3, "tol": 0.0},
        "output": {"path": f"{name}.zarr", "time_interval_s": 0.05, "max_projections": True},
        "compute": {"scheduler": "threads", "workers": 1, "frames_per_task": 4},
    }
    job = folder / f"{name}.toml"
    job.write_text(tomli_w.dumps(document))
    return job


def _measure(job: Path, workers: int, *, fresh: bool) -> dict[str, float]:
    if fresh:
        store = job.with_suffix(".zarr")
        if store.exists():
            import shutil

            shutil.rmtree(store)
    out = subprocess.run([sys.executable, "-c", _CHILD, str(job), str(workers)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=16, help="frames of the short run")
    parser.add_argument("--factor", type=int, default=10, help="long run = factor x frames")
    parser.add_argument("--size", type=int, nargs=3, default=(16, 128, 128),
                        metavar=("Z", "Y", "X"))
    parser.add_argument("--iterations", type=int, default=10)
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    figures: dict[str, object] = {"size_zyx": list(args.size), "iterations": args.iterations}
    with tempfile.TemporaryDirectory(prefix="volrecon-bench-") as tmp:
        folder = Path(tmp)
        short = _make_job(folder, n_frames=args.frames, size_zyx=tuple(args.size),
                          iterations=args.iterations, name="short", rng=rng)
        long = _make_job(folder, n_frames=args.frames * args.factor, size_zyx=tuple(args.size),
                         iterations=args.iterations, name="long", rng=rng)
        short_run = _measure(short, 1, fresh=True)
        long_run = _measure(long, 1, fresh=True)
        figures["memory"] = {
            "short_frames": short_run["frames"], "short_peak_rss_mib": short_run["peak_rss_mib"],
            "long_frames": long_run["frames"], "long_peak_rss_mib": long_run["peak_rss_mib"],
            "ratio": long_run["peak_rss_mib"] / short_run["peak_rss_mib"],
            "long_output_mib": long_run["frames"] * int(np.prod(args.size)) * 4 / 2**20,
        }
        one = _measure(short, 1, fresh=True)
        two = _measure(short, 2, fresh=True)
        figures["throughput"] = {
            "workers_1_frames_per_second": one["frames_per_second"],
            "workers_2_frames_per_second": two["frames_per_second"],
            "speedup": two["frames_per_second"] / one["frames_per_second"],
        }
    from volrecon.backend import available_cores

    figures["cores"] = available_cores()
    if args.json:
        print(json.dumps(figures, indent=2))
        return 0
    memory, speed = figures["memory"], figures["throughput"]
    assert isinstance(memory, dict) and isinstance(speed, dict)
    print(f"volume {tuple(args.size)} float32, ADMM {args.iterations} iterations, "
          f"{figures['cores']} cores")
    print(f"peak RSS, {memory['short_frames']:>5} frames: {memory['short_peak_rss_mib']:8.1f} MiB")
    print(f"peak RSS, {memory['long_frames']:>5} frames: {memory['long_peak_rss_mib']:8.1f} MiB "
          f"(output {memory['long_output_mib']:.0f} MiB uncompressed)")
    print(f"ratio long / short: {memory['ratio']:.3f}")
    print(f"throughput, 1 worker : {speed['workers_1_frames_per_second']:.2f} frames/s")
    print(f"throughput, 2 workers: {speed['workers_2_frames_per_second']:.2f} frames/s "
          f"(x{speed['speedup']:.2f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
