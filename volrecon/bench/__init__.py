"""Benchmarks that print figures (``volrecon bench`` / ``python -m volrecon.bench``).

Every figure is a ratio or a comparison measured in one run, because absolute times on
shared machines are noisy: per-iteration time against the FFT lower bound
(:mod:`volrecon.bench.iteration`) and, with ``--general``, time to a 1 % objective gap against
PyLops + PyProximal (:mod:`volrecon.bench.general`).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from typing import Any

__all__ = ["main"]


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmarks and print a table (or JSON with ``--json``)."""
    from volrecon.backend import get_backend
    from volrecon.bench import iteration

    parser = argparse.ArgumentParser(prog="volrecon bench", description=__doc__)
    parser.add_argument("--size", type=int, nargs=3, action="append", metavar=("Z", "Y", "X"))
    parser.add_argument("--device", choices=("cpu", "gpu"), default="cpu")
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--general", action="store_true",
                        help="also time PyLops + PyProximal on the same problem (needs both)")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(argv)
    sizes: list[tuple[int, int, int]] = (
        [(int(z), int(y), int(x)) for z, y, x in args.size] if args.size else [(16, 128, 128)])
    get_backend(args.device, threads=args.threads)  # fail early with a clear message
    report: dict[str, Any] = {"iteration": iteration.run(sizes, device=args.device,
                                                         threads=args.threads)}
    if args.general:
        from volrecon.bench import general

        frame, model = iteration.problem(8, 64, 64, "cpu", args.threads)
        level = float(frame.max())
        report["general"] = [general.compare(frame, model, tv=0.0, l1=1e-3 * level),
                             general.compare(frame, model, tv=1e-3 * level, l1=0.0)]
    if args.json:
        json.dump(report, sys.stdout, indent=1)
        sys.stdout.write("\n")
        return 0
    print("Per iteration against the FFT lower bound (Z forward + Z inverse real 2-D FFTs):")
    print(f"{'size (Z,Y,X)':>16} {'method':>6} {'tv':>7} {'l1':>7} {'s/iter':>10} "
          f"{'FFT bound':>10} {'ratio':>6}")
    for r in report["iteration"]:
        z, y, x = r["size_zyx"]
        print(f"{f'{z}x{y}x{x}':>16} {r['method']:>6} {r['tv']:>7.0e} {r['l1']:>7.0e} "
              f"{r['seconds_per_iteration']:>10.5f} {r['fft_bound_seconds']:>10.5f} "
              f"{r['ratio_to_bound']:>6.2f}")
    for r in report.get("general", []):
        fastest = min(r["volrecon"].items(), key=lambda item: item[1]["seconds"])
        print(f"to a 1 % objective gap, tv={r['tv']:.0e} l1={r['l1']:.0e}: volrecon {fastest[0]} "
              f"{fastest[1]['seconds']:.2f} s ({fastest[1]['iterations']} it), PyProximal "
              f"{r['pyproximal_seconds'] or float('nan'):.2f} s "
              f"({r['pyproximal_iterations']} it): {r['speedup']:.1f}x")
    return 0
