"""Array backend: numpy + scipy.fft on the CPU, CuPy + cupyx.scipy.fft on the GPU.

This is the one place that picks the compute device and the FFT thread count. CuPy is
imported only here and only when the GPU is asked for, so volrecon runs without it.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from itertools import pairwise
from types import ModuleType
from typing import TYPE_CHECKING, Any

import numpy as np
import scipy.fft

from volrecon.errors import BackendError, ConfigError

if TYPE_CHECKING:
    from collections.abc import Callable

__all__ = ["Backend", "available_cores", "get_backend", "keep_freed_memory",
           "physical_memory_bytes", "split_threads"]

DEVICES = ("cpu", "gpu")


def available_cores() -> int:
    """Number of CPU cores this process may run on (respects affinity masks)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


#: Arrays below this many bytes come from the C heap and are reused once freed (see
#: :func:`keep_freed_memory`); larger ones are mapped and unmapped as before.
HEAP_ARRAY_LIMIT = 1 << 30
_KEPT: list[bool] = []


def keep_freed_memory() -> bool:
    """Let this process reuse freed array memory instead of returning it to the OS; once.

    glibc maps every allocation above its dynamic threshold (at most 32 MiB) afresh and
    unmaps it when freed, and returns free memory at the top of its heap to the OS once it
    exceeds twice that threshold. Either way the next volume-sized array of a solve (a
    transform's output, every iteration) costs the kernel's zero-filling of its pages again:
    at 32×512² (128 MiB volumes) about 40 % of an ADMM iteration, and at 16×128² about 12 MB
    of fresh pages per warm ADMM + TV solve once the model keeps its factors (their arrays
    sit below the per-solve ones and leave the freed top to be trimmed). With the mmap
    threshold at :data:`HEAP_ARRAY_LIMIT` and no trimming, freed arrays are reused as they
    are. The cost: the process keeps its peak heap instead of shrinking after it
    (dask.distributed's nannies ask glibc to trim worker memory early; this overrides that
    for the process, whose solves reach the same peak frame after frame). Called by every
    CPU solve; returns whether the setting took (glibc on Linux only, elsewhere nothing
    changes).
    """
    if _KEPT:
        return _KEPT[0]
    applied = False
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        m_trim_threshold, m_mmap_threshold = -1, -3  # <malloc.h>
        applied = bool(libc.mallopt(m_mmap_threshold, HEAP_ARRAY_LIMIT)) and \
            bool(libc.mallopt(m_trim_threshold, (1 << 31) - 1))
    except (OSError, AttributeError):  # not glibc
        applied = False
    _KEPT.append(applied)
    return applied


def physical_memory_bytes() -> int:
    """Physical memory of this machine in bytes (2**50 where the OS does not say).

    Readers compare sizes declared in file headers with it before allocating anything.
    """
    try:
        return int(os.sysconf("SC_PHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - not on Linux
        return 1 << 50


def split_threads(workers: int, *, cores: int | None = None) -> int:
    """FFT threads per worker so that ``workers * threads <= cores`` (at least 1)."""
    if workers < 1:
        raise ConfigError(f"workers must be at least 1; got {workers}")
    cores = available_cores() if cores is None else cores
    return max(1, cores // workers)


@dataclass(frozen=True)
class Backend:
    """Array namespace, FFT module and thread count used by the solvers.

    Attributes
    ----------
    device : {"cpu", "gpu"}
        Where arrays live.
    xp : module
        ``numpy`` or ``cupy``.
    threads : int
        FFT worker threads (CPU only; ignored on the GPU).
    """

    device: str
    xp: ModuleType
    fft: ModuleType
    threads: int

    def rfft2(self, a: Any, shape_yx: tuple[int, int]) -> Any:
        """Real 2-D FFT over the last two axes, zero-padding them to `shape_yx`.

        Where `a` has fewer rows than the grid, the transform along x runs only on the rows
        present and the one along y zero-pads them: the zero rows are never transformed. The
        result is the same as that of the full padded transform (the same 1-D transforms of
        the same data).
        """
        kw = {"workers": self.threads} if self.device == "cpu" else {}
        py, px = shape_yx
        if a.shape[-2] >= py:
            return self.fft.rfft2(a, s=shape_yx, **kw)
        rows = self.fft.rfft(a, n=px, axis=-1, **kw)
        return self.fft.fft(rows, n=py, axis=-2, overwrite_x=True, **kw)

    def irfft2(self, a: Any, shape_yx: tuple[int, int], *, overwrite: bool = False) -> Any:
        """Inverse of :meth:`rfft2` on a grid of `shape_yx` (no cropping). With `overwrite`
        the transform may use `a` as scratch space (it saves a copy of the spectrum)."""
        if self.device == "cpu":
            return self.fft.irfft2(a, s=shape_yx, workers=self.threads, overwrite_x=overwrite)
        return self.fft.irfft2(a, s=shape_yx, overwrite_x=overwrite)

    def irfft2_window(self, a: Any, shape_yx: tuple[int, int], window_yx: tuple[int, int], *,
                      reverse: bool = False, overwrite: bool = False, out: Any = None) -> Any:
        """Inverse real 2-D FFT evaluated only on a ``window_yx`` corner of the grid.

        Returns ``r[..., :Y, :X]`` of ``r = irfft2(a, shape_yx)`` or, with `reverse`, the
        circularly index-reversed window ``r[..., -i mod Py, -j mod Px]``. The inverse along y
        runs on every column, the one along x only on the Y rows kept: fewer transforms than
        the full inverse followed by a crop. With `overwrite` the transform may use `a` as
        scratch space; with `out` (of the window's shape and the real dtype) the window is
        written there and `out` returned.
        """
        py, px = shape_yx
        ny, nx = window_yx
        kw = {"workers": self.threads} if self.device == "cpu" else {}
        columns = self.fft.ifft(a, axis=-2, overwrite_x=overwrite, **kw)
        if reverse:
            rows = self.xp.concatenate([columns[..., :1, :], columns[..., : py - ny : -1, :]],
                                       axis=-2)
        else:
            rows = columns[..., :ny, :]
        # `rows` is a new array or a view of one: the inverse along x may use it as scratch.
        full = self.fft.irfft(rows, n=px, axis=-1, overwrite_x=True, **kw)
        if out is None:
            out = self.xp.empty((*full.shape[:-1], nx), dtype=full.dtype)
        if reverse:
            out[..., 0] = full[..., 0]
            out[..., 1:] = full[..., : px - nx : -1]
        else:
            out[...] = full[..., :nx]
        return out

    def split_bounds(self, n: int) -> list[int]:
        """The range ends :meth:`run_split` cuts ``[0, n)`` at: up to `threads` contiguous
        ranges, as equal as possible (``[0, n]`` for one)."""
        pieces = max(1, min(self.threads, n))
        return [n * k // pieces for k in range(pieces + 1)]

    def run_split(self, kernel: Callable[..., None], n: int, *args: Any) -> None:
        """Run ``kernel(*args, lo, hi)`` on the ranges of :meth:`split_bounds` at once.

        For compiled kernels that release the GIL and write disjoint ranges of their outputs.
        With one range the kernel runs in the calling thread; otherwise the calling thread
        runs the first and pool threads the others.
        """
        bounds = self.split_bounds(n)
        if len(bounds) <= 2:
            kernel(*args, 0, n)
            return
        pool = _pool()
        futures = [pool.submit(kernel, *args, lo, hi) for lo, hi in pairwise(bounds[1:])]
        kernel(*args, bounds[0], bounds[1])
        for f in futures:
            f.result()

    def asarray(self, a: Any, dtype: Any = None) -> Any:
        """Move `a` onto this backend's device (no copy if already there)."""
        return self.xp.asarray(a, dtype=dtype)

    def to_numpy(self, a: Any) -> np.ndarray:
        """Bring `a` back to host memory as a numpy array."""
        if self.device == "cpu":
            return np.asarray(a)
        return self.xp.asnumpy(a)  # type: ignore[no-any-return]


_POOL: list[ThreadPoolExecutor] = []


def _pool() -> ThreadPoolExecutor:
    """The worker threads of :meth:`Backend.run_split`, started on first use."""
    if not _POOL:
        _POOL.append(ThreadPoolExecutor(max_workers=available_cores(),
                                        thread_name_prefix="volrecon-kernels"))
    return _POOL[0]


def _import_cupy() -> tuple[ModuleType, ModuleType]:
    try:
        import cupy
        import cupyx.scipy.fft as cufft
    except ImportError as exc:
        raise BackendError(
            "device='gpu' needs CuPy, which is not installed; install it with "
            "pip install 'volrecon[gpu]' (CUDA 12) or use device='cpu'"
        ) from exc
    if not cupy.cuda.is_available():
        raise BackendError(
            "device='gpu' was asked for but CuPy finds no usable CUDA device or driver; "
            "check nvidia-smi or use device='cpu'"
        )
    return cupy, cufft


def get_backend(device: str = "cpu", *, threads: int | None = None) -> Backend:
    """Return the backend for `device`.

    Parameters
    ----------
    device : {"cpu", "gpu"}
        ``"gpu"`` needs CuPy and a CUDA device.
    threads : int, optional
        FFT threads on the CPU. Default: every available core.

    Raises
    ------
    ConfigError
        If `device` is not one of ``"cpu"``, ``"gpu"`` or `threads` < 1.
    BackendError
        If the GPU is asked for but CuPy or a device is missing.
    """
    if device not in DEVICES:
        raise ConfigError(f"device must be 'cpu' or 'gpu'; got {device!r}")
    if threads is not None and threads < 1:
        raise ConfigError(f"threads must be at least 1; got {threads}")
    if device == "gpu":
        cupy, cufft = _import_cupy()
        return Backend("gpu", cupy, cufft, 1)
    return Backend("cpu", np, scipy.fft, threads or available_cores())
