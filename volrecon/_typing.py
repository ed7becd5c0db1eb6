"""Type aliases shared across volrecon."""

from __future__ import annotations

from typing import Any, TypeAlias

import numpy as np
import numpy.typing as npt

FloatArray: TypeAlias = npt.NDArray[np.floating[Any]]
ComplexArray: TypeAlias = npt.NDArray[np.complexfloating[Any, Any]]
#: A numpy array or, on the GPU path, a CuPy array with the same interface.
Array: TypeAlias = Any
RNGLike: TypeAlias = np.random.Generator | int | None

__all__ = ["Array", "ComplexArray", "FloatArray", "RNGLike"]
