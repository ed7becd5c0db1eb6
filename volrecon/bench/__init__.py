"""Benchmarks that print figures (``volrecon bench`` / ``python -m volrecon.bench``).

Every figure is a ratio or a comparison measured in one run, because absolute times on
shared machines are noisy: per-iteration time against the FFT lower bound
(:mod:`volrecon.bench.iteration`) and, with ``--general``, time to a 1 % objective gap against
PyLops + PyProximal (:mod:`volrecon.bench.general`). ``--pipeline`` times a whole job on a
simulated video instead (:mod:`volrecon.bench.pipeline`); ``--temporal`` measures the
temporal prior's gain and cost (:mod:`volrecon.bench.temporal`); ``--store`` the files and
reading speed of a long sharded store (:mod:`volrecon.bench.store`); ``--lenslet`` the cost of
the light-field model (:mod:`volrecon.bench.lenslet`).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Sequence
from typing import Any

__all__ = ["add_arguments", "main", "run"]

#: Per-iteration targets, multiples of the FFT bound (issue "throughput", float32).
ITERATION_TARGETS = {"fista": 1.3, "rl": 1.3, "admm": 1.5}
#: (tv, l1) of the warm-start figure, in units of the demo frame's peak (see warm_start.run).
WARM_START_CASES = ((0.05, 0.0), (0.0, 0.3))


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The options of ``volrecon bench`` (shared by the CLI and ``python -m volrecon.bench``)."""
    parser.add_argument("--size", type=int, nargs=3, action="append", metavar=("Z", "Y", "X"),
                        help="problem size (repeatable); default 16 128 128")
    parser.add_argument("--device", choices=("cpu", "gpu"), default="cpu")
    parser.add_argument("--threads", type=int, default=None,
                        help="FFT threads (default: all cores)")
    parser.add_argument("--general", action="store_true",
                        help="also time PyLops + PyProximal on the same problem")
    parser.add_argument("--warm-start", action="store_true",
                        help="also count ADMM iterations to tol, warm vs cold, on demo frames")
    parser.add_argument("--memory", action="store_true",
                        help="also measure peak memory at Z=64 on a 1024² sensor and per "
                             "low-rank rank (fresh processes; needs ~10 GB free)")
    parser.add_argument("--pipeline", action="store_true",
                        help="instead: marginal wall seconds per frame of a whole job "
                             "(volrecon run, 2 workers) on a simulated video, with quality "
                             "and projected hours (minutes; first --size only)")
    parser.add_argument("--frames", type=int, default=None, metavar="N",
                        help="--pipeline: frames of the simulated video (default 240); "
                             "--store: frames of the store (default 1000)")
    parser.add_argument("--tv", type=float, default=0.0, metavar="W",
                        help="--pipeline: [solver] tv of the job (default 0; the demo's 1e-3)")
    parser.add_argument("--scheduler", choices=("threads", "processes"), action="append",
                        help="--pipeline: dask scheduler (repeatable); default both")
    parser.add_argument("--temporal", action="store_true",
                        help="the temporal prior on a dim drifting video and across a cut, "
                             "against per-frame solves (a few minutes)")
    parser.add_argument("--lenslet", action="store_true",
                        help="instead: cost of the lenslet-array (light-field) model against "
                             "its lattice FFTs and the FFT bound, FISTA and RL per iteration")
    parser.add_argument("--store", action="store_true",
                        help="instead: files, size, napari opening time and bytes per time "
                             "step of a 1000-frame store, sharded and one file per chunk "
                             "(--frames sets the count; about a minute)")
    parser.add_argument("--all", action="store_true",
                        help="every figure: the sizes of the README table and all of the above")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")


def main(argv: Sequence[str] | None = None) -> int:
    """Parse `argv` and run the benchmarks."""
    parser = argparse.ArgumentParser(prog="volrecon bench", description=__doc__)
    add_arguments(parser)
    return run(parser.parse_args(argv))


def run(args: argparse.Namespace) -> int:
    """Run the benchmarks chosen in `args` and print a table (or JSON with ``--json``)."""
    from volrecon.backend import get_backend
    from volrecon.bench import iteration

    if args.all:
        args.general = args.warm_start = args.memory = True
    default = [(16, 128, 128), (32, 512, 512)] if args.all else [(16, 128, 128)]
    sizes: list[tuple[int, int, int]] = (
        [(int(z), int(y), int(x)) for z, y, x in args.size] if args.size else default)
    if args.pipeline:
        return _run_pipeline(args, sizes[0])
    if args.lenslet:
        from volrecon.bench import lenslet

        records = lenslet.run(threads=args.threads)
        return _show(args, "lenslet", records, lambda: lenslet.report_lines(records))
    if args.store:
        from volrecon.bench import store

        result = store.run(n_frames=args.frames or 1000, size_zyx=sizes[0])
        return _show(args, "store", result, lambda: store.report_lines(result))
    if args.temporal:
        from volrecon.bench import temporal

        result = temporal.run(threads=args.threads or 1)
        if args.json:
            json.dump({"temporal": result}, sys.stdout, indent=1)
            sys.stdout.write("\n")
        else:
            temporal.print_report(result)
        return 0
    get_backend(args.device, threads=args.threads)  # fail early with a clear message
    from volrecon.bench import overhead

    report: dict[str, Any] = {
        "iteration": iteration.run(sizes, device=args.device, threads=args.threads),
        "overhead": overhead.run(sizes, device=args.device, threads=args.threads)}
    if args.general:
        from volrecon.bench import general

        frame, model = iteration.problem(8, 64, 64, "cpu", args.threads)
        level = float(frame.max())
        report["general"] = [general.compare(frame, model, tv=0.0, l1=1e-3 * level),
                             general.compare(frame, model, tv=1e-3 * level, l1=0.0)]
    if args.warm_start:
        from volrecon.bench import warm_start

        report["warm_start"] = [warm_start.run(tv=tv, l1=l1, threads=args.threads)
                                for tv, l1 in WARM_START_CASES]
    if args.memory:
        from volrecon.bench import memory

        report["memory"] = memory.run()
    if args.json:
        json.dump(report, sys.stdout, indent=1)
        sys.stdout.write("\n")
        return 0
    print("Per iteration against the FFT lower bound (Z forward + Z inverse real 2-D FFTs):")
    print(f"{'size (Z,Y,X)':>16} {'method':>6} {'tv':>7} {'l1':>7} {'s/iter':>10} "
          f"{'FFT bound':>10} {'ratio':>6} {'target':>6}")
    for r in report["iteration"]:
        z, y, x = r["size_zyx"]
        print(f"{f'{z}x{y}x{x}':>16} {r['method']:>6} {r['tv']:>7.0e} {r['l1']:>7.0e} "
              f"{r['seconds_per_iteration']:>10.5f} {r['fft_bound_seconds']:>10.5f} "
              f"{r['ratio_to_bound']:>6.2f} {ITERATION_TARGETS[r['method']]:>6.2f}")
    print("Warm solve of k iterations (solve_frame: set-up, loop, objective and residual), "
          "in FFT-bound iterations:")
    for r in report["overhead"]:
        z, y, x = r["size_zyx"]
        costs = ", ".join(f"k={k}: {c:.1f}" for k, c in
                          zip(r["iterations"], r["solve_in_bounds"], strict=True))
        print(f"{f'{z}x{y}x{x}':>16} {r['method']:>6} tv {r['tv']:<5g}  {costs};  fixed cost "
              f"{r['overhead_in_bounds']:.2f} (target <= {r['overhead_target']:g}), per "
              f"iteration {r['per_iteration_in_bounds']:.2f}")
    for r in report.get("general", []):
        fastest = min(r["volrecon"].items(), key=lambda item: item[1]["seconds"])
        print(f"to a 1 % objective gap, tv={r['tv']:.0e} l1={r['l1']:.0e}: volrecon {fastest[0]} "
              f"{fastest[1]['seconds']:.2f} s ({fastest[1]['iterations']} it), PyProximal "
              f"{r['pyproximal_seconds'] or float('nan'):.2f} s "
              f"({r['pyproximal_iterations']} it): {r['speedup']:.1f}x")
    for r in report.get("warm_start", []):
        print(f"warm start, admm tol={r['tol']:.0e} tv={r['tv']:g} l1={r['l1']:g} on "
              f"{len(r['cold_iterations'])} demo frames: cold {r['cold_iterations']} vs warm "
              f"{r['warm_iterations']} iterations: {r['ratio_cold_to_warm']:.2f}x fewer")
    if "memory" in report:
        m = report["memory"]
        gib = 2.0**30
        z, y, x = m["size_zyx"]
        print(f"peak RSS at {z}x{y}x{x}: " + ", ".join(
            f"{k} {v / gib:.2f} GiB" for k, v in m["peak_rss_bytes"].items()))
        z, y, x = m["low_rank_size_zyx"]
        print(f"peak RSS at {z}x{y}x{x} (fista) by rank: " + ", ".join(
            f"r={k} {v / gib:.2f} GiB" for k, v in m["low_rank_peak_rss_bytes"].items())
            + f", full {m['full_rank_peak_rss_bytes'] / gib:.2f} GiB")
    return 0


def _run_pipeline(args: argparse.Namespace, size_zyx: tuple[int, int, int]) -> int:
    from volrecon.bench import pipeline
    from volrecon.errors import ConfigError

    if args.device != "cpu":
        raise ConfigError("--pipeline runs on the CPU; leave out --device")
    report = pipeline.run(n_frames=args.frames or 240, size_zyx=size_zyx, threads=args.threads,
                          schedulers=args.scheduler or ("threads", "processes"),
                          tv=args.tv)
    return _show(args, "pipeline", report, lambda: pipeline.report_lines(report))


def _show(args: argparse.Namespace, name: str, result: Any,
          lines: Callable[[], list[str]]) -> int:
    """Print one benchmark's `result` as JSON under `name` (``--json``) or as its lines."""
    if args.json:
        json.dump({name: result}, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print("\n".join(lines()))
    return 0
