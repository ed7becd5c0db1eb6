"""``volrecon run --estimate`` against the real run: predicted ÷ measured time and store size.

Reproduce: ``python -m volrecon.bench.estimate [JOB.toml ...] [--json]``. Without job files it
measures two jobs made here: the demo's (``volrecon demo``: 40 frames of 16×128², ADMM with
automatic iterations, 2 thread workers, projections) and one of its own (a 10×96×160 hydrogel
video, FISTA with 25 iterations, 2 process workers, chains of 6 after 1 lead-in frame, float16,
12 frames per shard file, no projections).

For each job the estimate and the run each start in a fresh process, as a user runs them
(``volrecon run JOB --estimate``, then ``volrecon run JOB --restart``): the run's time is that
whole command's wall time, its size every file of the finished store. Each figure is a ratio
measured in this one run; the target (tracker issue 15) is 0.7 to 1.3.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

__all__ = ["TARGET", "main", "measure_job", "report_lines", "run"]

#: Predicted ÷ measured must lie in this range (time and size).
TARGET = (0.7, 1.3)

_ESTIMATE = """
import dataclasses, json, sys
from volrecon.pipeline import load_job
from volrecon.pipeline.estimate import estimate_job
print(json.dumps(dataclasses.asdict(estimate_job(load_job(sys.argv[1])))))
"""
_RUN = "import sys; from volrecon.cli import main; sys.exit(main(sys.argv[1:]))"


def _store_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def measure_job(job_path: str | os.PathLike[str]) -> dict[str, Any]:
    """Estimate `job_path` in a fresh process, then run it from scratch in another; return
    both figures and their ratios. The job's store is made again (``--restart``)."""
    from volrecon.pipeline import load_job

    job_path = Path(job_path)
    done = subprocess.run([sys.executable, "-c", _ESTIMATE, str(job_path)], check=True,
                          capture_output=True, text=True)
    estimate = json.loads(done.stdout.splitlines()[-1])
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", _RUN, "run", str(job_path), "--restart"],
                   check=True, capture_output=True)
    seconds = time.perf_counter() - t0
    store = load_job(job_path).output_path
    size = _store_bytes(store)
    return {"job": str(job_path), "frames": estimate["frames"],
            "predicted_seconds": estimate["seconds"], "seconds": seconds,
            "time_ratio": estimate["seconds"] / seconds,
            "predicted_bytes": estimate["store_bytes"], "bytes": size,
            "size_ratio": estimate["store_bytes"] / size}


def _demo_job(folder: Path) -> Path:
    from volrecon.demo import run_demo

    return run_demo(folder / "demo").job_path


def _own_job(folder: Path) -> Path:
    import tomli_w

    from volrecon.calibrate import calibrate_file
    from volrecon.simulate import MicroscopeDesign, write_hydrogel_scenario

    own = folder / "own"
    scenario = write_hydrogel_scenario(own / "raw", rng=3, n_frames=48, n_planes=10,
                                       design=MicroscopeDesign(shape_yx=(96, 160)))
    calibrate_file(scenario.files["psf_scan"], own / "model",
                   depth_step_um=scenario.depth_step_um, pixel_size_um=scenario.pixel_size_um,
                   depth_start_um=scenario.depth_start_um, dark_path=scenario.files["dark"])
    document = {
        "model": {"path": "model"},
        "video": {"path": "raw/video.tif", "dark": "raw/dark.tif"},
        "solver": {"method": "fista", "iterations": 25, "tv": 0.0, "warm_start": True,
                   "chain_frames": 6, "lead_in_frames": 1},
        "output": {"path": "out.zarr", "time_interval_s": scenario.frame_interval_s,
                   "dtype": "float16", "shard_frames": 12, "max_projections": False},
        "compute": {"scheduler": "processes", "workers": 2, "frames_per_task": 12},
    }
    path = own / "job.toml"
    path.write_bytes(tomli_w.dumps(document).encode())
    return path


def run(job_paths: Sequence[str | os.PathLike[str]] = (), *,
        directory: str | os.PathLike[str] | None = None) -> list[dict[str, Any]]:
    """Measure each job of `job_paths` (default: the demo's and one of this module's own)."""
    with contextlib.ExitStack() as stack:
        if job_paths:
            return [measure_job(path) for path in job_paths]
        folder = Path(directory) if directory is not None else Path(
            stack.enter_context(tempfile.TemporaryDirectory(prefix="volrecon-estimate-")))
        folder.mkdir(parents=True, exist_ok=True)
        jobs = [_demo_job(folder), _own_job(folder)]
        shutil.rmtree(jobs[0].parent / "volumes.zarr")  # the demo ran it once
        return [measure_job(path) for path in jobs]


def report_lines(records: Sequence[dict[str, Any]]) -> list[str]:
    """One line per job: predicted, measured and their ratio, time and size, beside the target."""
    low, high = TARGET
    lines = [f"{'job':<40} {'frames':>6} {'est s':>7} {'run s':>7} {'ratio':>6} "
             f"{'est MB':>7} {'run MB':>7} {'ratio':>6}  target {low:g}..{high:g}"]
    for r in records:
        name = r["job"] if len(r["job"]) <= 40 else "…" + r["job"][-39:]
        lines.append(f"{name:<40} {r['frames']:>6} {r['predicted_seconds']:>7.1f} "
                     f"{r['seconds']:>7.1f} {r['time_ratio']:>6.2f} "
                     f"{r['predicted_bytes'] / 1e6:>7.2f} {r['bytes'] / 1e6:>7.2f} "
                     f"{r['size_ratio']:>6.2f}")
    return lines


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: ``python -m volrecon.bench.estimate [JOB.toml ...] [--json]``."""
    parser = argparse.ArgumentParser(prog="python -m volrecon.bench.estimate",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("jobs", nargs="*", help="job files (their stores are made again)")
    parser.add_argument("--directory", help="keep the made jobs here (default: a temporary "
                        "folder)")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = parser.parse_args(argv)
    records = run(args.jobs, directory=args.directory)
    if args.json:
        json.dump(records, sys.stdout, indent=1)
        print()
    else:
        print("\n".join(report_lines(records)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
