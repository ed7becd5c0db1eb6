"""Backend selection and the optional GPU path."""

from __future__ import annotations

import importlib.util
import subprocess
import sys

import numpy as np
import pytest

import volrecon
from volrecon.backend import available_cores, get_backend, split_threads
from volrecon.errors import BackendError, ConfigError
from volrecon.models import PSFModel


def _gpu_available() -> bool:
    if importlib.util.find_spec("cupy") is None:
        return False
    import cupy

    return bool(cupy.cuda.is_available())


def test_split_threads_never_oversubscribes():
    # Known truth: workers × threads must not exceed the cores, and never drop below 1.
    assert split_threads(2, cores=8) == 4
    assert split_threads(3, cores=8) == 2
    assert split_threads(16, cores=8) == 1
    assert split_threads(1) == available_cores()
    with pytest.raises(ConfigError, match="workers"):
        split_threads(0)


def test_unknown_device_refused():
    with pytest.raises(ConfigError, match="device must be"):
        get_backend("tpu")
    with pytest.raises(ConfigError, match="threads"):
        get_backend("cpu", threads=0)


@pytest.mark.skipif(_gpu_available(), reason="a GPU is present")
def test_gpu_without_cupy_or_device_is_a_clear_error(rng):
    model = PSFModel.from_stack(rng.random((2, 8, 8)), 1.0, 1.0)
    with pytest.raises(BackendError, match="device='gpu'"):
        volrecon.reconstruct(rng.random((8, 8)), model, device="gpu")


@pytest.mark.gpu
@pytest.mark.skipif(not _gpu_available(), reason="needs CuPy and a CUDA device")
@pytest.mark.parametrize("method, tv", [("admm", 0.0), ("admm", 1e-3), ("fista", 0.0),
                                        ("fista", 1e-3), ("rl", 0.0)])
def test_gpu_matches_cpu(rng, method, tv):
    psf = rng.random((4, 32, 32)).astype(np.float32) ** 6
    psf /= psf.sum(axis=(1, 2), keepdims=True)
    model = PSFModel.from_stack(psf, 1.0, 1.0)
    frame = model.forward((rng.random((4, 32, 32)) > 0.99).astype(np.float32))
    cpu = volrecon.reconstruct(frame, model, method=method, iterations=30, tv=tv, l1=1e-4,
                               tol=0.0)
    gpu = volrecon.reconstruct(frame, model, method=method, iterations=30, tv=tv, l1=1e-4,
                               tol=0.0, device="gpu")
    import cupy

    # Reference: the CPU path (float32 on both; FFT libraries differ in rounding only).
    gpu = cupy.asnumpy(gpu)
    assert np.linalg.norm(gpu - cpu) / np.linalg.norm(cpu) < 1e-3


_FAULTS_SCRIPT = """
import resource, sys
import numpy as np
from volrecon.backend import keep_freed_memory

if sys.argv[1] == "keep":
    assert keep_freed_memory()
a = np.ones(24 << 20, np.float32)  # 96 MiB: above glibc's largest dynamic mmap threshold
for _ in range(2):
    b = a * 2
    del b
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(5):
    b = a * 2
    del b
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


@pytest.mark.skipif(sys.platform != "linux", reason="the setting is glibc's")
def test_freed_arrays_are_reused_not_mapped_afresh():
    """A freed 96 MiB array's memory serves the next one without new page faults once
    :func:`keep_freed_memory` has raised glibc's mmap threshold (man 3 mallopt:
    M_MMAP_THRESHOLD, M_TRIM_THRESHOLD); without it, each new array faults its pages in."""
    def faults(mode: str) -> int:
        done = subprocess.run([sys.executable, "-c", _FAULTS_SCRIPT, mode], check=True,
                              capture_output=True, text=True)
        return int(done.stdout.strip())

    fresh, kept = faults("plain"), faults("keep")
    assert fresh >= 5 * 40  # 5 arrays, each at least 40 pages (huge pages: 48 of 2 MiB)
    assert kept * 4 < fresh, (kept, fresh)


_SOLVE_FAULTS_SCRIPT = """
import resource
from volrecon.bench.iteration import problem
from volrecon.solvers import SolverSettings, solve_frame

frame, model = problem(16, 128, 128, "cpu", None)
settings = SolverSettings(method="admm", iterations=3, tv=1e-3, tol=0.0)
start = solve_frame(frame, model, SolverSettings(method="admm", iterations=20, tv=1e-3,
                                                 tol=0.0)).info.state
for _ in range(3):
    solve_frame(frame, model, settings, init=start)
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(10):
    solve_frame(frame, model, settings, init=start)
print((resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / 10)
"""


@pytest.mark.skipif(sys.platform != "linux", reason="the setting is glibc's")
def test_warm_solves_reuse_their_memory():
    """Warm ADMM + TV solves of the same size, one after the other, fault no fresh pages in:
    each reuses the memory the one before freed (12 MB of new pages per solve at 16×128²
    when glibc trims its heap, see keep_freed_memory)."""
    done = subprocess.run([sys.executable, "-c", _SOLVE_FAULTS_SCRIPT], check=True,
                          capture_output=True, text=True)
    assert float(done.stdout.strip()) < 100  # pages of 4 KiB: under 0.4 MB per solve
