"""Export a job's frames as a movie (H.264 ``.mp4`` or ``.gif``) with a scale bar and the time.

Each movie frame is one 2-D view of a finished store frame (the maximum along z, or one
plane), mapped to 8 bits by fixed contrast limits taken from percentiles of the finished
frames, magnified by a whole factor when the volume is small, with a scale bar and the frame
time drawn in white.
"""

from __future__ import annotations

import contextlib
import math
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from volrecon.errors import ConfigError, InputFileError, OutputWriteError, VolreconError
from volrecon.io.files import replacing
from volrecon.io.ome_zarr import parse_ome_image
from volrecon.pipeline.export import parse_frame_range
from volrecon.pipeline.store import DAMAGE_ERRORS, STATUS_DONE, JobStore

__all__ = [
    "MovieResult",
    "contrast_limits",
    "export_movie",
    "parse_projection",
    "render_frame",
    "scale_bar_um",
    "to_uint8",
]

MOVIE_SUFFIXES = (".mp4", ".gif")
#: Frames are magnified (nearest neighbour, whole factor) until their longer side has at least
#: this many pixels, so the scale bar label and the time fit and players show more than a dot.
MIN_MOVIE_PIXELS = 256
#: Percentiles of the finished frames' pixels that map to black and white.
DEFAULT_PERCENTILES = (0.5, 99.5)
#: At most this many pixels are pooled for the percentiles (whole frames, evenly spaced).
PERCENTILE_PIXELS = 1 << 24


@dataclass(frozen=True)
class MovieResult:
    """What :func:`export_movie` wrote.

    Attributes
    ----------
    path : Path
        The movie file.
    frames : list of int
        Store frames in the movie, in order.
    skipped : int
        Selected frames left out because they are not done (pending or failed).
    limits : (float, float)
        Values mapped to 0 and 255.
    zoom : int
        Magnification of every store pixel (movie pixels per store pixel along y and x).
    scale_bar_um, scale_bar_pixels : float, int
        Length of the scale bar in micrometres and in movie pixels.
    fps : float
        Frames per second.
    """

    path: Path
    frames: list[int]
    skipped: int
    limits: tuple[float, float]
    zoom: int
    scale_bar_um: float
    scale_bar_pixels: int
    fps: float


def parse_projection(text: str | None, n_planes: int) -> int | None:
    """Parse ``"max"`` (None: maximum along z) or ``"z=K"`` (plane K, 0 <= K < n_planes).

    Raises
    ------
    ConfigError
        For any other text or a plane outside the volume.
    """
    if text is None or text == "max":
        return None
    name, _, value = text.partition("=")
    try:
        if name.strip() != "z":
            raise ValueError(text)
        plane = int(value)
    except ValueError:
        raise ConfigError(f"--projection {text!r}: use 'max' or 'z=K' (a plane number)") from None
    if not 0 <= plane < n_planes:
        raise ConfigError(f"--projection {text!r}: plane {plane} is outside the volume's "
                          f"planes 0..{n_planes - 1}; choose z=0 to z={n_planes - 1}")
    return plane


def contrast_limits(planes: list[np.ndarray], *,
                    percentiles: tuple[float, float] = DEFAULT_PERCENTILES) -> tuple[float, float]:
    """Values at the `percentiles` of all finite pixels of `planes` (numpy's linear rule).

    A range of zero width (a constant movie) is widened to ``(low, low + 1)``.
    """
    pixels = np.concatenate([p[np.isfinite(p)].ravel() for p in planes])
    if pixels.size == 0:
        raise ConfigError("the selected frames have no finite pixel to set the contrast from")
    low, high = (float(v) for v in np.percentile(pixels, percentiles))
    return (low, high) if high > low else (low, low + 1.0)


def to_uint8(plane_yx: np.ndarray, limits: tuple[float, float]) -> np.ndarray:
    """Map `limits` to 0..255 linearly, clip outside, round to nearest; NaN becomes 0."""
    low, high = limits
    scaled = (np.asarray(plane_yx, dtype=np.float64) - low) * (255.0 / (high - low))
    scaled = np.nan_to_num(scaled, nan=0.0)
    out: np.ndarray = np.rint(np.clip(scaled, 0.0, 255.0)).astype(np.uint8)
    return out


def scale_bar_um(width_um: float) -> float:
    """The largest 1, 2 or 5 × 10^k micrometres not over a fifth of `width_um`.

    Examples
    --------
    >>> scale_bar_um(15.6), scale_bar_um(100.0), scale_bar_um(0.5)
    (2.0, 20.0, 0.1)
    """
    target = width_um / 5.0
    exponent = math.floor(math.log10(target))
    for mantissa in (5.0, 2.0, 1.0):
        length = mantissa * 10.0**exponent
        if length <= target * (1 + 1e-9):
            return length
    return 10.0**exponent  # pragma: no cover - 1 × 10^floor(log10) is always <= target


def _format_um(length_um: float) -> str:
    return f"{length_um:g} µm" if length_um >= 1 else f"{length_um * 1000:g} nm"


def _time_decimals(interval_s: float) -> int:
    return min(6, max(0, math.ceil(-math.log10(interval_s) - 1e-9)))


def render_frame(plane_yx: np.ndarray, *, limits: tuple[float, float], zoom: int,
                 bar_pixels: int, bar_label: str, time_label: str) -> np.ndarray:
    """One movie frame: 8-bit grey, magnified, padded to even sizes, bar and time drawn.

    Parameters
    ----------
    plane_yx : ndarray of shape (Y, X)
        The store view (float).
    limits : (float, float)
        Values mapped to black and white (see :func:`to_uint8`).
    zoom : int
        Whole magnification (each store pixel becomes ``zoom × zoom`` movie pixels).
    bar_pixels : int
        Scale bar length in movie pixels, drawn bottom right.
    bar_label, time_label : str
        Text above the bar and at the top left.

    Returns
    -------
    ndarray of shape (H, W), uint8
        H and W even (H.264 needs them so): ``Y·zoom`` and ``X·zoom`` rounded up to even, the
        added row or column black.
    """
    from PIL import Image, ImageDraw, ImageFont

    grey = to_uint8(plane_yx, limits)
    grey = np.repeat(np.repeat(grey, zoom, axis=0), zoom, axis=1)
    height, width = grey.shape
    frame = np.zeros((height + height % 2, width + width % 2), np.uint8)
    frame[:height, :width] = grey
    margin = max(4, height // 40)
    thickness = max(2, height // 100)
    font = ImageFont.load_default(size=max(10, height // 20))
    image = Image.fromarray(frame)
    draw = ImageDraw.Draw(image)
    draw.text((margin, margin), time_label, fill=255, font=font, stroke_width=1, stroke_fill=0)
    bar_right = width - margin
    bar_bottom = height - margin
    *_, bottom = draw.textbbox((0, 0), bar_label, font=font)
    draw.text((bar_right - bar_pixels, bar_bottom - thickness - 2 - bottom), bar_label, fill=255,
              font=font, stroke_width=1, stroke_fill=0)
    out = np.array(image)
    # The bar itself from numpy: exactly bar_pixels wide, whatever the text engine rounds.
    out[bar_bottom - thickness:bar_bottom, bar_right - bar_pixels:bar_right] = 255
    return out


@contextlib.contextmanager
def _open_movie(path: Path, fps: float) -> Iterator[Callable[[np.ndarray], Any]]:
    """Yield a function that appends one frame; the file is complete when the block ends."""
    if path.suffix.lower() == ".gif":
        import imageio.v3 as iio

        with iio.imopen(path, "w", plugin="pillow", extension=".gif") as file:
            gif: Any = file  # the pillow plugin's write takes GIF options (duration in ms, loop)
            yield lambda frame: gif.write(frame, duration=1000.0 / fps, loop=0)
        return
    import imageio.v2 as imageio

    # Sizes are already even, so no resizing to 16-pixel blocks.
    writer = imageio.get_writer(path, format="FFMPEG", mode="I", fps=fps, codec="libx264",
                                pixelformat="yuv420p", macro_block_size=1, quality=8)
    try:
        yield writer.append_data
    finally:
        writer.close()


def export_movie(store_path: str | os.PathLike[str], movie_path: str | os.PathLike[str], *,
                 projection: str | None = None, fps: float = 10.0, frames: str | None = None,
                 percentiles: tuple[float, float] = DEFAULT_PERCENTILES) -> MovieResult:
    """Write the finished frames of a store as an H.264 ``.mp4`` or a ``.gif``.

    Parameters
    ----------
    store_path : str or path
        A job's output store.
    movie_path : str or path
        The movie to write, ending in ``.mp4`` or ``.gif`` (replaced if it exists).
    projection : str, optional
        ``"max"`` (default): maximum along z, from the stored ``projections/max_z`` when the
        store has them; ``"z=K"``: plane K.
    fps : float
        Frames per second, > 0 (default 10).
    frames : str, optional
        ``"a:b"`` store frames (half-open); default all. Frames not done are skipped.
    percentiles : (float, float)
        Percentiles of the finished frames' pixels mapped to black and white (default 0.5 and
        99.5). Up to 2^24 pixels are pooled: all frames, or evenly spaced ones beyond that.

    Returns
    -------
    MovieResult

    Notes
    -----
    The scale bar is the largest 1, 2 or 5 × 10^k µm up to a fifth of the width, its length in
    movie pixels ``round(length / pixel_x · zoom)``; the time label is ``t · interval`` seconds
    from the store's OME scale. Frames are read one at a time (twice: once for the contrast).

    Raises
    ------
    InputFileError
        If `store_path` is not an output store or a frame's chunk is damaged.
    ConfigError
        For a bad projection, frame range, fps or suffix, or when no selected frame is done.
    OutputWriteError
        If `movie_path` cannot be written; an existing file there is left unchanged.
    """
    out = Path(movie_path)
    if out.suffix.lower() not in MOVIE_SUFFIXES:
        raise ConfigError(f"--movie {out}: name a file ending in .mp4 (H.264) or .gif")
    if not (math.isfinite(fps) and fps > 0):
        raise ConfigError(f"--fps {fps!r}: use a positive number of frames per second")
    store = JobStore.open(store_path, mode="r")
    image = store.image
    _, nz, ny, nx = image.shape
    plane = parse_projection(projection, nz)
    selected = parse_frame_range(frames, store.n_frames)
    if out.is_dir():
        raise OutputWriteError(f"--movie {out}: is a folder; give the name of a movie file")
    if not out.parent.is_dir():
        raise OutputWriteError(f"--movie {out}: {out.parent} is not an existing folder; "
                               "create it or choose another path")
    status = store.committed_status()[selected]  # with frames a running task committed
    done = [selected.start + int(i) for i in np.flatnonzero(status == STATUS_DONE)]
    skipped = len(status) - len(done)
    if not done:
        raise ConfigError(f"{store.path}: none of frames {selected.start}:{selected.stop} is "
                          "done; run the job first or choose finished frames with --frames")
    interval_s, _, _, pixel_x = parse_ome_image(store.group.attrs.asdict(),
                                                source=store_path).levels[0].scale
    source = None
    if plane is None and "projections" in store.group:
        source = store.group["projections/max_z"]

    def read(t: int) -> np.ndarray:
        array = source if source is not None else image
        try:
            if source is not None:
                return np.asarray(source[t], dtype=np.float32)
            if plane is not None:
                return np.asarray(image[t, plane], dtype=np.float32)
            return np.asarray(np.max(image[t], axis=0), dtype=np.float32)
        except DAMAGE_ERRORS as exc:
            raise InputFileError(
                f"{store.path}: frame {t} of '{array.path}' cannot be read ({exc}); the store "
                "is damaged there: export other frames with --frames, or recompute the job "
                "with --restart") from exc

    step = max(1, math.ceil(len(done) * ny * nx / PERCENTILE_PIXELS))
    limits = contrast_limits([read(t) for t in done[::step]], percentiles=percentiles)
    zoom = max(1, MIN_MOVIE_PIXELS // max(ny, nx))
    bar_um = scale_bar_um(nx * pixel_x)
    bar_pixels = round(bar_um / pixel_x * zoom)
    decimals = _time_decimals(interval_s)

    def movie_frames() -> Iterator[np.ndarray]:
        for t in done:
            yield render_frame(read(t), limits=limits, zoom=zoom, bar_pixels=bar_pixels,
                               bar_label=_format_um(bar_um),
                               time_label=f"t = {t * interval_s:.{decimals}f} s")

    try:
        # Written beside the target (same suffix: it picks the format) and renamed at the end.
        with replacing(out) as partial:
            staged = partial.with_name(partial.name + out.suffix)
            try:
                with _open_movie(staged, fps) as append:
                    for frame in movie_frames():
                        append(frame)
                os.replace(staged, partial)
            finally:
                staged.unlink(missing_ok=True)
    except OSError as exc:
        if isinstance(exc, VolreconError):
            raise
        raise OutputWriteError(
            f"--movie {out}: cannot write the file ({exc.strerror or exc}); choose a path in a "
            "writable folder with enough free space") from exc
    return MovieResult(path=out, frames=done, skipped=skipped, limits=limits, zoom=zoom,
                       scale_bar_um=bar_um, scale_bar_pixels=bar_pixels, fps=fps)
