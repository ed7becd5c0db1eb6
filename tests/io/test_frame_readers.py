"""Frame readers: every kind returns exactly the pixels written by tifffile / zarr, pickles,
reads lazily through dask, and refuses damaged input with an InputFileError."""

from __future__ import annotations

import pickle
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import tifffile
import zarr
from dask.array.utils import assert_eq

from volrecon.errors import InputFileError, ShapeError
from volrecon.io import (
    FrameSource,
    TiffFrames,
    TiffGlobFrames,
    ZarrFrames,
    natural_sort_key,
    open_frames,
    read_image,
)


class FrameSourceContract:
    """Shared checks; each subclass writes the same frames in its own format."""

    kind: type[FrameSource]
    shape = (7, 9, 10)  # odd and even sides

    def frames(self, rng: np.random.Generator) -> np.ndarray:
        # Random values (not a ramp alone) so a swapped or shifted frame shows.
        return rng.integers(0, 60000, self.shape, dtype=np.uint16)

    def write(self, tmp_path: Path, frames: np.ndarray) -> str:
        raise NotImplementedError

    @pytest.fixture
    def written(self, tmp_path: Path, rng: np.random.Generator) -> tuple[FrameSource, np.ndarray]:
        frames = self.frames(rng)
        source = open_frames(self.write(tmp_path, frames))
        return source, frames

    def test_kind_shape_dtype(self, written):
        source, frames = written
        assert type(source) is self.kind
        assert source.shape == frames.shape and source.dtype == frames.dtype

    def test_read_ranges_equal_written_pixels(self, written):
        source, frames = written
        # Reference: the array handed to the writer (tifffile / zarr), read back unchanged.
        for start, stop in ((0, 1), (2, 5), (0, frames.shape[0]), (6, 7)):
            np.testing.assert_array_equal(source.read(start, stop), frames[start:stop])

    def test_pickles_and_reads_after(self, written):
        source, frames = written
        clone = pickle.loads(pickle.dumps(source))
        np.testing.assert_array_equal(clone.read(1, 4), frames[1:4])

    @pytest.mark.parametrize("per_chunk", [1, 3])
    def test_dask_lazy_equals_eager(self, written, per_chunk):
        source, frames = written
        lazy = source.to_dask(per_chunk)
        assert isinstance(lazy, da.Array) and lazy.chunks[0][0] == per_chunk
        assert_eq(lazy, frames)

    def test_range_outside_refused(self, written):
        source, _ = written
        with pytest.raises(ShapeError, match="outside"):
            source.read(5, 99)


class TestContiguousTiff(FrameSourceContract):
    kind = TiffFrames

    def write(self, tmp_path, frames):
        tifffile.imwrite(tmp_path / "raw.tif", frames, photometric="minisblack")
        return str(tmp_path / "raw.tif")

    def test_read_by_offset(self, written):
        source, _ = written
        assert source.data_offset is not None  # the constant-time path is the one tested


class TestCompressedBigTiff(FrameSourceContract):
    kind = TiffFrames

    def write(self, tmp_path, frames):
        tifffile.imwrite(tmp_path / "raw.tif", frames, photometric="minisblack",
                         compression="zlib", bigtiff=True)
        return str(tmp_path / "raw.tif")

    def test_read_by_page(self, written):
        source, _ = written
        assert source.data_offset is None


class TestPageSeriesTiff(FrameSourceContract):
    """Written page by page without contiguous=True: one series per page."""

    kind = TiffFrames

    def write(self, tmp_path, frames):
        with tifffile.TiffWriter(tmp_path / "raw.tif") as writer:
            for frame in frames:
                writer.write(frame, photometric="minisblack")
        return str(tmp_path / "raw.tif")


class TestBigEndianFloatTiff(FrameSourceContract):
    kind = TiffFrames

    def frames(self, rng):
        return rng.standard_normal(self.shape).astype(np.float32)

    def write(self, tmp_path, frames):
        tifffile.imwrite(tmp_path / "raw.tif", frames, photometric="minisblack", byteorder=">")
        return str(tmp_path / "raw.tif")


class TestTiffGlob(FrameSourceContract):
    kind = TiffGlobFrames

    def write(self, tmp_path, frames):
        folder = tmp_path / "frames"
        folder.mkdir()
        for t, frame in enumerate(frames):  # unpadded numbers: natural order needed
            tifffile.imwrite(folder / f"img_{t}.tif", frame, photometric="minisblack")
        return str(folder / "img_*.tif")


class TestZarrArray(FrameSourceContract):
    kind = ZarrFrames

    def write(self, tmp_path, frames):
        zarr.create_array(tmp_path / "raw.zarr", data=frames, chunks=(2, 5, 5))
        return str(tmp_path / "raw.zarr")


def test_zarr_component_inside_group(tmp_path, rng):
    frames = rng.integers(0, 100, (4, 6, 6), dtype=np.uint8)
    group = zarr.open_group(tmp_path / "g.zarr", mode="w")
    group.create_array("cam/raw", data=frames)
    with pytest.raises(InputFileError, match="is a zarr group"):
        open_frames(tmp_path / "g.zarr")
    source = open_frames(tmp_path / "g.zarr", component="cam/raw")
    np.testing.assert_array_equal(source.read(0, 4), frames)
    with pytest.raises(InputFileError, match="no zarr array"):
        open_frames(tmp_path / "g.zarr", component="nope")


def test_natural_order():
    names = ["f10.tif", "f2.tif", "f1.tif", "F3.tif"]
    assert sorted(names, key=natural_sort_key) == ["f1.tif", "f2.tif", "F3.tif", "f10.tif"]


def test_missing_and_non_tiff_refused(tmp_path):
    with pytest.raises(InputFileError, match="no such file"):
        open_frames(tmp_path / "none.tif")
    (tmp_path / "text.tif").write_text("hello")
    with pytest.raises(InputFileError, match="not a readable TIFF"):
        open_frames(tmp_path / "text.tif")
    with pytest.raises(InputFileError, match="no file matches"):
        open_frames(tmp_path / "*.tiff")


@pytest.mark.parametrize("fraction", [0.5, 0.97])
def test_truncated_tiff_refused(tmp_path, rng, fraction):
    frames = rng.integers(0, 60000, (6, 32, 32), dtype=np.uint16)
    path = tmp_path / "raw.tif"
    tifffile.imwrite(path, frames, photometric="minisblack")
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * fraction)])
    with pytest.raises(InputFileError, match="truncated"):
        open_frames(path)


def test_colour_and_4d_tiffs_refused(tmp_path, rng):
    tifffile.imwrite(tmp_path / "rgb.tif", rng.integers(0, 255, (8, 8, 3), dtype=np.uint8),
                     photometric="rgb")
    with pytest.raises(InputFileError, match="2-D grayscale"):
        open_frames(tmp_path / "rgb.tif")
    tifffile.imwrite(tmp_path / "tz.tif", np.zeros((2, 3, 8, 8), np.float32), imagej=True,
                     metadata={"axes": "TZYX"})
    with pytest.raises(InputFileError, match="axes TZYX"):
        open_frames(tmp_path / "tz.tif")


def test_glob_with_a_different_frame_refused(tmp_path):
    folder = tmp_path / "frames"
    folder.mkdir()
    tifffile.imwrite(folder / "a1.tif", np.zeros((8, 8), np.uint16))
    tifffile.imwrite(folder / "a2.tif", np.zeros((8, 9), np.uint16))
    tifffile.imwrite(folder / "a3.tif", np.zeros((8, 8), np.uint16))
    # One frame per file: only the first and last are opened at once, the rest when read.
    source = open_frames(folder / "a*.tif")
    with pytest.raises(InputFileError, match=r"a2\.tif: holds frames of \(8, 9\) uint16, the "
                                             r"first file .* move the odd file out"):
        source.read(0, 3)
    (folder / "a3.tif").unlink()
    with pytest.raises(InputFileError, match=r"a2\.tif: holds frames of \(8, 9\) uint16, but "
                                             r".*a1\.tif \(8, 8\) uint16"):
        open_frames(folder / "a*.tif")


def test_file_replaced_after_open_is_reported(tmp_path, rng):
    path = tmp_path / "raw.tif"
    tifffile.imwrite(path, rng.integers(0, 9, (5, 8, 8), dtype=np.uint16))
    source = open_frames(path)
    path.write_bytes(b"")
    with pytest.raises(InputFileError, match="cannot read frames"):
        source.read(0, 5)


def test_read_image_averages_a_stack(tmp_path, rng):
    stack = rng.integers(90, 110, (5, 6, 7), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "dark.tif", stack)
    # Reference: numpy's mean over the frame axis.
    np.testing.assert_allclose(read_image(tmp_path / "dark.tif"), stack.mean(axis=0),
                               rtol=1e-6)
    assert read_image(tmp_path / "dark.tif").dtype == np.float32
