"""Which frames a tuning run looks at, and reading them.

A *site* is a video frame ``t`` together with its neighbours ``t − 1`` and ``t + 1``: the
sweep reconstructs ``t``; the neighbours see (almost) the same scene with independent noise,
so they serve as held-out data and, with ``t``, as a run of three for the photon-transfer
estimate of the noise; the three frames also form the warm-start chain of the iteration
check. Sites are spread evenly through the frames the job reconstructs.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from volrecon.errors import ConfigError

if TYPE_CHECKING:
    from volrecon.io.correct import FrameCorrection
    from volrecon.io.frames import FrameSource

__all__ = ["Site", "choose_site_frames", "read_sites"]


@dataclass(frozen=True, eq=False)
class Site:
    """A frame and its two neighbours, corrected onto the model grid.

    Attributes
    ----------
    frame : int
        Video frame ``t`` (0-based).
    frames_3yx : ndarray of shape (3, Y, X), float32
        Corrected frames ``t − 1, t, t + 1``.
    """

    frame: int
    frames_3yx: np.ndarray


def choose_site_frames(first: int, stop: int, n_frames: int, *, count: int = 3,
                       frames: Sequence[int] | None = None, where: str = "video"
                       ) -> tuple[int, ...]:
    """Video frames to tune on.

    Parameters
    ----------
    first, stop : int
        Half-open range of video frames the job reconstructs.
    n_frames : int
        Frames in the video (neighbours may lie just outside the job's range).
    count : int
        Sites spread evenly through ``first..stop`` when `frames` is not given (at least 1).
    frames : sequence of int, optional
        Explicit frames; each needs a neighbour on both sides.
    where : str
        Name of the video, for messages.

    Returns
    -------
    tuple of int
        Sorted distinct frames.

    Raises
    ------
    ConfigError
        If the video has fewer than 3 frames, a given frame has no neighbour on one side,
        or `count` is below 1.
    """
    if n_frames < 3:
        raise ConfigError(f"{where}: has {n_frames} frame(s); tuning needs at least 3 "
                          "consecutive frames (a frame and its two neighbours)")
    if frames is not None:
        chosen = sorted({int(t) for t in frames})
        if not chosen:
            raise ConfigError("--frames is empty; give video frame numbers such as 10,200")
        for t in chosen:
            if not 1 <= t <= n_frames - 2:
                raise ConfigError(
                    f"{where}: frame {t} cannot be a tuning frame; it needs a neighbour on "
                    f"each side, so choose frames 1 to {n_frames - 2}"
                )
        return tuple(chosen)
    if count < 1:
        raise ConfigError(f"the number of tuning frames must be at least 1; got {count}")
    low, high = max(first, 1), min(stop - 1, n_frames - 1) - 1
    if high < low:
        low = high = min(max(first, 1), n_frames - 2)
    positions = np.linspace(low, high, count + 2)[1:-1] if count < high - low + 1 else \
        np.arange(low, high + 1)
    return tuple(sorted({int(np.rint(p)) for p in positions}))


def read_sites(source: FrameSource, correction: FrameCorrection, frames: Sequence[int]
               ) -> tuple[Site, ...]:
    """Read and correct each frame with its neighbours.

    Raises
    ------
    InputFileError
        If the video cannot be read.
    """
    return tuple(Site(frame=int(t), frames_3yx=correction.apply(source.read(t - 1, t + 2)))
                 for t in frames)
