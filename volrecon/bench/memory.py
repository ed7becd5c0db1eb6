"""Peak memory of one reconstruction, each case in a fresh subprocess.

The child builds a model of the given size (random PSF planes: memory does not depend on their
content), reconstructs one frame with a few iterations and reports its own peak resident set
size (``VmHWM``). Low-rank depth models of rank r are measured the same way,
to show their memory growing with r rather than with Z.
"""

from __future__ import annotations

import json
import subprocess
import sys
from typing import Any

__all__ = ["peak_rss_bytes", "process_peak_rss_bytes", "run"]

_CHILD = r"""
import json, sys
import numpy as np
from volrecon.models import Geometry, LowRankDepthPSF, PSFModel
from volrecon.bench.memory import process_peak_rss_bytes
from volrecon.solvers import reconstruct
nz, ny, nx, method, rank, iterations = json.loads(sys.argv[1])
rng = np.random.default_rng(0)
if rank:
    kernels = rng.random((rank, ny, nx), dtype=np.float32)
    weights = rng.random((nz, rank), dtype=np.float32)
    model = LowRankDepthPSF(kernels, weights, Geometry(2.0, 1.0))
else:
    model = PSFModel.from_stack(rng.random((nz, ny, nx), dtype=np.float32), 2.0, 1.0)
frame = rng.random((ny, nx), dtype=np.float32)
tv = 1e-3 if method.endswith("+tv") else 0.0
reconstruct(frame, model, method=method.removesuffix("+tv"), iterations=iterations,
            l1=0.0 if tv else 1e-3, tv=tv, tol=0.0)
print(json.dumps(process_peak_rss_bytes()))
"""


def process_peak_rss_bytes() -> int:
    """Peak resident memory of this process image (``VmHWM``), in bytes.

    Not ``getrusage().ru_maxrss``: on Linux that also keeps the peak of the forked copy of the
    parent before ``exec``, so a child of a large process reports the parent's size.
    """
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:  # pragma: no cover - not Linux
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def peak_rss_bytes(nz: int, ny: int, nx: int, method: str, *, rank: int = 0,
                   iterations: int = 2) -> int:
    """Peak RSS of a child process reconstructing one frame."""
    out = subprocess.run([sys.executable, "-c", _CHILD,
                          json.dumps([nz, ny, nx, method, rank, iterations])],
                         check=True, capture_output=True, text=True)
    return int(out.stdout.strip().splitlines()[-1])


def run(*, large: tuple[int, int, int] = (64, 1024, 1024), methods: tuple[str, ...] = (
        "fista", "rl", "admm"), ranks: tuple[int, ...] = (2, 4, 8, 16),
        rank_size: tuple[int, int, int] = (64, 256, 256)) -> dict[str, Any]:
    """Peak RSS per method at `large`, and per rank for low-rank models at `rank_size`."""
    nz, ny, nx = large
    per_method = {m: peak_rss_bytes(nz, ny, nx, m) for m in methods}
    rz, ry, rx = rank_size
    per_rank = {r: peak_rss_bytes(rz, ry, rx, "fista", rank=r) for r in ranks}
    full = peak_rss_bytes(rz, ry, rx, "fista")
    return {"size_zyx": list(large), "peak_rss_bytes": per_method,
            "low_rank_size_zyx": list(rank_size), "low_rank_peak_rss_bytes": per_rank,
            "full_rank_peak_rss_bytes": full}
