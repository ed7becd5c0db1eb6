"""Every exception and warning class volrecon raises.

Each error derives from :class:`VolreconError` and from the built-in exception a caller
would expect, so ``except ValueError`` and ``except VolreconError`` both work. Messages are
one line: where (file, zarr key or job-file key), what was found, what was expected, the fix.
"""

from __future__ import annotations

__all__ = [
    "BackendError",
    "ConfigError",
    "DataError",
    "FrameOffsetWarning",
    "HotPixelWarning",
    "InputFileError",
    "ModelStoreError",
    "OutputWriteError",
    "ShapeError",
    "StoreLockedError",
    "StoreMismatchError",
    "UnitWarning",
    "VolreconError",
    "VolreconWarning",
    "WorkersLostError",
]


class VolreconError(Exception):
    """Base class of every error volrecon raises on purpose."""


class ShapeError(VolreconError, ValueError):
    """An array has the wrong number of axes or the wrong size."""


class DataError(VolreconError, ValueError):
    """Array values are unusable: NaN/Inf, all zero, negative where not allowed."""


class ConfigError(VolreconError, ValueError):
    """A job file, option or keyword argument is missing, unknown or out of range."""


class InputFileError(VolreconError, OSError):
    """An input file is missing, unreadable, truncated or of the wrong kind."""


class ModelStoreError(VolreconError, ValueError):
    """A path is not a volrecon PSF model store, or one from an unsupported format version."""


class OutputWriteError(VolreconError, OSError):
    """An output (store, lock, exported TIFF) cannot be written: disk full, read-only, bad path."""


class StoreMismatchError(VolreconError, ValueError):
    """An output store was written by a job with other settings."""


class StoreLockedError(VolreconError, RuntimeError):
    """Another live process is writing to the same output store."""


class BackendError(VolreconError, RuntimeError):
    """The requested compute device (e.g. the GPU through CuPy) is not available."""


class WorkersLostError(VolreconError, RuntimeError):
    """Every dask worker of a run was lost, or workers kept dying while running one task."""


class VolreconWarning(UserWarning):
    """Something odd that does not stop the work."""


class FrameOffsetWarning(VolreconWarning):
    """The frames' offset looks wrong: a dark subtracted twice, too high, or not given."""


class HotPixelWarning(VolreconWarning):
    """The video holds hot pixels that no dark frame removes."""


class UnitWarning(VolreconWarning):
    """A physical size lies outside the range common for the instrument (a unit mix-up?)."""
