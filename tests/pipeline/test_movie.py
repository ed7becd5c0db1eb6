"""`volrecon export --movie`: H.264 and GIF movies read back with imageio (ffmpeg, Pillow)."""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import imageio.v3 as iio
import imageio_ffmpeg
import numpy as np
import pytest
from jobdata import N_FRAMES, SHAPE_ZYX, read_volumes

from volrecon.cli import main
from volrecon.errors import ConfigError
from volrecon.pipeline import JobStore, load_job, run_job
from volrecon.pipeline.movie import export_movie, parse_projection, scale_bar_um

PIXEL_UM = 0.65  # jobdata's model pixel size
ZOOM = 256 // SHAPE_ZYX[2]  # 24 px frames are magnified 10× (the longer side to >= 256 px)
SIZE = SHAPE_ZYX[1] * ZOOM


def _expected_grey(views_tyx: np.ndarray, finished: list[int], t: int) -> np.ndarray:
    """The frame's pixels mapped by the 0.5/99.5 percentiles of the finished frames, magnified."""
    # Reference: numpy.percentile (linear interpolation) over every pixel of the finished views.
    low, high = np.percentile(views_tyx[finished], [0.5, 99.5])
    grey = np.rint(np.clip((views_tyx[t].astype(np.float64) - low) / (high - low), 0, 1) * 255)
    return np.kron(grey, np.ones((ZOOM, ZOOM)))  # nearest-neighbour magnification


def _middle(frame: np.ndarray) -> np.ndarray:
    """Rows between the time label (top) and the scale bar (bottom), first colour channel."""
    return frame[SIZE // 5: 3 * SIZE // 5, :, 0].astype(np.int64)


def _decode(movie: Path) -> tuple[str, float, np.ndarray]:
    """Codec, frame rate and grey frames (N, H, W) of a movie, decoded by the ffmpeg binary.

    (Run directly: imageio's ffmpeg reader leaves its pipes for the garbage collector, and
    the ResourceWarning that follows would land in some later test.)
    """
    run = subprocess.run([imageio_ffmpeg.get_ffmpeg_exe(), "-hide_banner", "-i", str(movie),
                          "-f", "rawvideo", "-pix_fmt", "gray", "-"], capture_output=True,
                         check=True)
    info = re.search(r"Video: (\w+).*?, (\d+)x(\d+).*?, ([\d.]+) fps", run.stderr.decode())
    assert info is not None, run.stderr.decode()
    width, height = int(info[2]), int(info[3])
    frames = np.frombuffer(run.stdout, np.uint8).reshape(-1, height, width)
    return info[1], float(info[4]), frames


@pytest.fixture
def finished_store(job_files):
    run_job(load_job(job_files.write_job(output={"max_projections": True})))
    return job_files.folder / "out.zarr"


def test_mp4_decodes_with_the_frames_size_fps_and_contrast(finished_store, capsys):
    movie = finished_store.parent / "m.mp4"
    assert main(["export", str(finished_store), "--movie", str(movie), "--fps", "5",
                 "--frames", "2:9"]) == 0
    assert "7 frames at 5 fps" in capsys.readouterr().out
    # Reference: the ffmpeg binary's own decoder and stream description.
    codec, fps, frames = _decode(movie)
    assert codec == "h264" and fps == 5.0
    assert frames.shape == (7, SIZE, SIZE)
    frames = frames[..., None]
    views = read_volumes(finished_store).max(axis=1)
    for k, t in enumerate(range(2, 9)):
        error = np.abs(_middle(frames[k]) - _middle(_expected_grey(views, list(range(2, 9)),
                                                                    t)[..., None]))
        # H.264 is lossy: measured ≤ 3 grey levels here (smooth 10×10 blocks), mean < 1.
        assert error.max() <= 6 and error.mean() < 1.5


def test_gif_keeps_the_exact_contrast_and_the_scale_bar_length(finished_store):
    result = export_movie(finished_store, finished_store.parent / "m.gif", projection="z=1")
    # Reference: Pillow's GIF reader (through imageio); grey GIF frames are lossless.
    frames = iio.imread(result.path, index=None)
    assert frames.shape[:3] == (N_FRAMES, SIZE, SIZE)
    assert iio.immeta(result.path, index=0)["duration"] == 100  # 10 fps: 100 ms a frame
    views = read_volumes(finished_store)[:, 1]
    expected = _expected_grey(views, list(range(N_FRAMES)), 4)
    np.testing.assert_array_equal(_middle(frames[4]), _middle(expected[..., None]))
    # The bar: 2 µm (the 1-2-5 length up to a fifth of 15.6 µm) over 0.65 µm pixels × zoom.
    assert result.scale_bar_um == 2.0
    bar = round(2.0 / PIXEL_UM * ZOOM)
    assert result.scale_bar_pixels == bar == 31
    margin = SIZE // 40
    row = frames[4][SIZE - margin - 1, :, 0]
    white = np.flatnonzero(row == 255)
    assert white.max() == SIZE - margin - 1 and white.min() == SIZE - margin - bar
    assert np.all(row[SIZE - margin - bar:SIZE - margin] == 255)
    # The time and the bar label are drawn (white text) above the image.
    assert (frames[4][:SIZE // 10, :SIZE // 2, 0] == 255).any()


def test_frames_not_done_are_skipped_and_counted(finished_store, capsys):
    JobStore.open(finished_store).mark_pending([3, 7])
    movie = finished_store.parent / "m.gif"
    assert main(["export", str(finished_store), "--movie", str(movie)]) == 0
    out = capsys.readouterr().out
    assert out.count("\n") == 1 and "2 frames not done skipped" in out
    assert len(iio.imread(movie, index=None)) == N_FRAMES - 2


def test_scale_bar_lengths_follow_the_1_2_5_rule():
    # Reference: the 1-2-5 series, the largest value not over a fifth of the width.
    assert [scale_bar_um(w) for w in (15.6, 100.0, 7.0, 0.5, 50.0)] == [2.0, 20.0, 1.0, 0.1, 10.0]


@pytest.mark.parametrize(("text", "expected"), [(None, None), ("max", None), ("z=0", 0),
                                                ("z=2", 2)])
def test_projection_texts(text, expected):
    assert parse_projection(text, 3) == expected


@pytest.mark.parametrize(("args", "names"), [
    (["--projection", "mean"], "--projection 'mean'"),
    (["--projection", "z=3"], "plane 3 is outside"),
    (["--fps", "0"], "--fps"),
    (["--frames", "20:30"], "selects no frame"),
])
def test_bad_movie_options_are_one_line_exit_2(finished_store, capsys, args, names):
    movie = finished_store.parent / "m.mp4"
    assert main(["export", str(finished_store), "--movie", str(movie), *args]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and names in err
    assert not movie.exists()


@pytest.mark.parametrize("target", ["missing/m.mp4", "model", "m.avi", "raw.tif/m.gif"])
def test_unwritable_movie_paths_are_one_line_exit_2(finished_store, capsys, target):
    path = finished_store.parent / target
    assert main(["export", str(finished_store), "--movie", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"--movie {path}" in err


def test_an_existing_movie_is_replaced_only_when_the_new_one_is_complete(finished_store):
    movie = finished_store.parent / "m.mp4"
    movie.write_bytes(b"last week's movie")
    with pytest.raises(ConfigError, match="plane 9"):
        export_movie(finished_store, movie, projection="z=9")
    assert movie.read_bytes() == b"last week's movie"
    export_movie(finished_store, movie)
    assert len(_decode(movie)[2]) == N_FRAMES
    assert not [p for p in movie.parent.iterdir() if p.name.endswith(".partial")]
