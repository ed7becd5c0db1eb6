"""Cost of the lenslet-array model against the transforms it needs and the FFT bound.

``python -m volrecon.bench.lenslet`` builds :class:`~volrecon.models.LensletPSF` models of a
few sizes (random non-negative responses within ±2 lenslets of the point: the cost does not
depend on the values) and prints, per size:

- ``forward + adjoint`` against the coarse transforms they cannot avoid: Z·N² forward and
  N² inverse real FFTs of the whole lattice grid (:attr:`LensletPSF.lattice_padded_shape`,
  sized to the responses' reach) for the forward, N² forward and Z·N² inverse for the
  adjoint (target: at most 2×), whatever tiling the model chose (:attr:`LensletPSF.tiles_yx`,
  in the JSON). The rest is the per-frequency products with the Z·N² × N² spectrum
  matrices, bound by reading them from memory: their share grows as N²;
- the same against the FFT bound of a shift-invariant model of the same volume (Z forward +
  Z inverse real FFTs of the full padded grid, :func:`volrecon.bench.iteration.fft_lower_bound`);
- the same against the transforms of the plain formulation, ``N²`` strided convolutions per
  depth on the padded grid: Z·N² forward real FFTs of the volume masked to each sub-lattice
  for the forward and Z·N² inverse for the adjoint (N² times the FFT bound; its two
  single-plane transforms are left out, so the reference is a little low). This is the
  "Z·N² half-size (real) transforms" the issue allows one application; the lattice figure
  above is the stricter one;
- FISTA and RL seconds per iteration (long minus short solve) against that FFT bound.

Every figure is a ratio of times measured in the same process (shared machines are noisy).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from volrecon.bench.iteration import _synchronize, fft_lower_bound, per_iteration_seconds
from volrecon.models import LensletPSF, PSFModel

__all__ = ["SIZES", "TARGET", "coarse_transform_seconds", "main", "problem", "report_lines",
           "run"]

#: (Z, N, Y = X) cases: Z planes, N × N pixels per lenslet, a Y × X sensor.
SIZES = ((8, 5, 60), (16, 5, 200), (8, 8, 128))
#: Issue target: forward + adjoint at most this multiple of the coarse transforms they need.
TARGET = 2.0


def problem(nz: int, pitch: int, size: int, *, threads: int | None = None
            ) -> tuple[np.ndarray, LensletPSF]:
    """A random lenslet model on a ``size × size`` sensor and a frame of scattered points."""
    rng = np.random.default_rng(2)
    psf = np.zeros((nz, pitch, pitch, size, size), np.float32)
    y0, x0 = pitch * ((size // 2) // pitch), pitch * ((size // 2) // pitch)
    reach = 2 * pitch
    window = (slice(max(y0 - reach, 0), y0 + pitch + reach),
              slice(max(x0 - reach, 0), x0 + pitch + reach))
    block = psf[..., window[0], window[1]]
    block[...] = rng.random(block.shape, dtype=np.float32) ** 4
    model = PSFModel.from_stack(psf, 1.5, 0.325, lenslet_pitch=pitch)
    model = model.on_device("cpu", threads=threads)
    truth = (rng.random(model.shape_in) > 0.999).astype(np.float32)
    frame = np.asarray(model.backend.to_numpy(model.forward(truth)))
    frame += 0.01 * float(frame.max()) * rng.standard_normal(frame.shape).astype(np.float32)
    model.operator_norm_squared()
    if not isinstance(model, LensletPSF):  # from_stack with lenslet_pitch gives one
        raise TypeError(f"expected a LensletPSF, got {type(model).__name__}")
    return frame, model


def coarse_transform_seconds(model: LensletPSF, *, repeats: int = 5) -> float:
    """Fastest of `repeats` timings of the lattice-grid FFTs one forward + adjoint needs."""
    be = model.backend
    grid = model.lattice_padded_shape
    nz, pairs = model.n_planes, model.lenslet_pitch**2
    qy, qx = model.lattice_shape
    many = be.asarray(np.random.default_rng(0).random((nz * pairs, qy, qx), dtype=np.float32),
                      dtype=model.dtype)
    few = many[:pairs]
    many_spectra, few_spectra = be.rfft2(many, grid), be.rfft2(few, grid)
    times = []
    for _ in range(repeats):
        _synchronize(be)
        t0 = time.perf_counter()
        be.rfft2(many, grid)        # forward: Z·N² forward ...
        be.irfft2(few_spectra, grid)  # ... and N² inverse
        be.rfft2(few, grid)         # adjoint: N² forward ...
        be.irfft2(many_spectra, grid)  # ... and Z·N² inverse
        _synchronize(be)
        times.append(time.perf_counter() - t0)
    return min(times)


def _apply_seconds(model: LensletPSF, frame: np.ndarray, *, repeats: int = 5) -> float:
    volume = model.adjoint(frame)
    model.forward(volume)  # warm the FFT plans
    times = []
    for _ in range(repeats):
        _synchronize(model.backend)
        t0 = time.perf_counter()
        model.forward(volume)
        model.adjoint(frame)
        _synchronize(model.backend)
        times.append(time.perf_counter() - t0)
    return min(times)


def run(sizes: Sequence[tuple[int, int, int]] = SIZES, *, threads: int | None = None,
        methods: Sequence[str] = ("fista", "rl")) -> list[dict[str, Any]]:
    """Measure every size; one record per size (seconds and ratios)."""
    records = []
    for nz, pitch, size in sizes:
        frame, model = problem(nz, pitch, size, threads=threads)
        apply = _apply_seconds(model, frame)
        coarse = coarse_transform_seconds(model)
        bound = fft_lower_bound(model)
        record: dict[str, Any] = {
            "size_znyx": [nz, pitch, size, size], "tiles_yx": list(model.tiles_yx),
            "apply_seconds": apply,
            "coarse_transform_seconds": coarse, "fft_bound_seconds": bound,
            "apply_over_coarse": apply / coarse, "apply_over_fft_bound": apply / bound,
            "apply_over_strided_transforms": apply / (pitch**2 * bound),
            "target": TARGET, "per_iteration": {}}
        for method in methods:
            seconds, ratio = per_iteration_seconds(frame, model, method, tv=0.0, l1=0.0,
                                                   repeats=3)
            record["per_iteration"][method] = {"seconds": seconds, "ratio_to_bound": ratio}
        records.append(record)
    return records


def report_lines(records: Sequence[dict[str, Any]]) -> list[str]:
    """The table :func:`main` prints."""
    lines = ["Lenslet-array model: forward + adjoint against the lattice FFTs they need, and "
             "per iteration against the FFT bound of a shift-invariant model (Z forward + Z "
             "inverse full-grid real FFTs); /N²bd: against the Z·N² full-grid real FFTs of "
             "N² strided convolutions per depth:",
             f"{'Z,N,Y,X':>14} {'A+At s':>9} {'lattice':>9} {'ratio':>6} {'target':>6} "
             f"{'FFT bound':>9} {'A+At/bd':>7} {'/N²bd':>6}  per iteration / bound"]
    for r in records:
        z, n, y, x = r["size_znyx"]
        iterations = ", ".join(f"{m} {v['seconds']:.4f} s = {v['ratio_to_bound']:.2f}x"
                               for m, v in r["per_iteration"].items())
        lines.append(f"{f'{z},{n},{y},{x}':>14} {r['apply_seconds']:>9.5f} "
                     f"{r['coarse_transform_seconds']:>9.5f} {r['apply_over_coarse']:>6.2f} "
                     f"{r['target']:>6.1f} {r['fft_bound_seconds']:>9.5f} "
                     f"{r['apply_over_fft_bound']:>7.2f} "
                     f"{r['apply_over_strided_transforms']:>6.3f}  {iterations}")
    return lines


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m volrecon.bench.lenslet [--size Z N Y] [--threads T] [--json]``."""
    parser = argparse.ArgumentParser(prog="python -m volrecon.bench.lenslet",
                                     description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, nargs=3, action="append", metavar=("Z", "N", "Y"),
                        help="Z planes, N pixels per lenslet, Y × Y sensor (repeatable)")
    parser.add_argument("--threads", type=int, default=None, help="FFT threads")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = parser.parse_args(argv)
    sizes = [tuple(s) for s in args.size] if args.size else list(SIZES)
    records = run(sizes, threads=args.threads)
    if args.json:
        json.dump(records, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print("\n".join(report_lines(records)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
