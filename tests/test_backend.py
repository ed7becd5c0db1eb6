"""Backend selection and the optional GPU path."""

from __future__ import annotations

import importlib.util

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
