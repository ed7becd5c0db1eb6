"""Reading bead-scan TIFFs and position CSVs; parsing option strings."""

from __future__ import annotations

import logging

import numpy as np
import pytest
import tifffile

from volrecon.calibrate import parse_crop, parse_rank, read_positions, read_tiff_stack
from volrecon.errors import ConfigError, InputFileError, ShapeError


@pytest.mark.parametrize("shape, dtype", [((5, 12, 10), np.uint16), ((2, 3, 9, 8), np.float32),
                                          ((4, 6, 7), np.uint8), ((3, 6, 6), np.int32)])
def test_reads_what_tifffile_wrote(rng, tmp_path, shape, dtype):
    data = (rng.random(shape) * 200).astype(dtype)
    tifffile.imwrite(tmp_path / "scan.tif", data, photometric="minisblack")
    # Reference: the array handed to tifffile.imwrite.
    got = read_tiff_stack(tmp_path / "scan.tif")
    assert got.dtype == dtype
    np.testing.assert_array_equal(got, data)


def test_missing_damaged_and_unsuitable_files(rng, tmp_path):
    with pytest.raises(InputFileError, match=r"no such file.*bead scan"):
        read_tiff_stack(tmp_path / "absent.tif")
    (tmp_path / "notes.tif").write_text("not an image")
    with pytest.raises(InputFileError, match=r"notes\.tif: cannot read"):
        read_tiff_stack(tmp_path / "notes.tif")
    tifffile.imwrite(tmp_path / "full.tif", rng.integers(0, 999, (6, 64, 64), dtype=np.uint16),
                     photometric="minisblack")
    data = (tmp_path / "full.tif").read_bytes()
    (tmp_path / "cut.tif").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputFileError, match=r"cut\.tif"):
        read_tiff_stack(tmp_path / "cut.tif")
    tifffile.imwrite(tmp_path / "rgb.tif", np.zeros((3, 8, 8, 3), np.uint8), photometric="rgb")
    with pytest.raises(InputFileError, match="colour"):
        read_tiff_stack(tmp_path / "rgb.tif", what="dark frame")
    tifffile.imwrite(tmp_path / "complex.tif", np.ones((2, 4, 4), np.complex64),
                     photometric="minisblack")
    with pytest.raises(InputFileError, match="pixel type complex64"):
        read_tiff_stack(tmp_path / "complex.tif")


def test_cut_page_chain_is_refused_not_read_short(tmp_path):
    data = np.arange(6 * 32 * 32, dtype=np.uint16).reshape(6, 32, 32)
    with tifffile.TiffWriter(tmp_path / "pages.tif") as writer:
        for page in data:
            writer.write(page, photometric="minisblack")
    with tifffile.TiffFile(tmp_path / "pages.tif") as tf:
        third = tf.pages[2].offset
    (tmp_path / "cut.tif").write_bytes((tmp_path / "pages.tif").read_bytes()[:third])
    # Known truth: the file ends where the third page's directory should start; tifffile
    # only logs that, and would otherwise hand back a shorter stack. Also when a caller has
    # silenced tifffile's logger (as the CLI does).
    with pytest.raises(InputFileError, match="truncated or corrupt"):
        read_tiff_stack(tmp_path / "cut.tif")
    logger = logging.getLogger("tifffile")
    before = logger.level
    logger.setLevel(logging.CRITICAL)
    try:
        with pytest.raises(InputFileError, match="truncated or corrupt"):
            read_tiff_stack(tmp_path / "cut.tif")
        assert logger.level == logging.CRITICAL
    finally:
        logger.setLevel(before)


@pytest.mark.parametrize("text", ["12,30\n40,5.5\n", "y_px,x_px\n12,30\n40,5.5\n",
                                  "x_px, y_px\n30,12\n5.5,40\n", "\n12 , 30\n\n40,5.5\n"])
def test_positions_csv_forms(tmp_path, text):
    (tmp_path / "p.csv").write_text(text)
    # Known truth: the two positions written, as (y, x).
    np.testing.assert_array_equal(read_positions(tmp_path / "p.csv", 2), [[12, 30], [40, 5.5]])


@pytest.mark.parametrize("text, count, error, match", [
    ("1,2\n3,4\n", 3, ShapeError, "has 2 positions but the bead scan has 3"),
    ("1,2,3\n", 1, ShapeError, "row 1 has 3 values"),
    ("1,2\nfoo,4\n", 2, InputFileError, "row 2"),
    ("1,nan\n", 1, InputFileError, "NaN"),
])
def test_bad_positions_csv(tmp_path, text, count, error, match):
    (tmp_path / "p.csv").write_text(text)
    with pytest.raises(error, match=match):
        read_positions(tmp_path / "p.csv", count)


def test_missing_or_binary_positions_file(tmp_path):
    with pytest.raises(InputFileError, match="--positions"):
        read_positions(tmp_path / "none.csv", 1)
    (tmp_path / "bin.csv").write_bytes(b"\xff\xfe\x00\x81")
    with pytest.raises(InputFileError, match=r"bin\.csv"):
        read_positions(tmp_path / "bin.csv", 1)


def test_option_parsing():
    assert parse_crop(" 0:64, 8:72 ") == (0, 64, 8, 72)
    assert parse_rank("AUTO") == "auto" and parse_rank("12") == 12 and parse_rank(None) is None
    for bad in ("0:64", "a:b,c:d", "0:64;0:64"):
        with pytest.raises(ConfigError, match="Y0:Y1,X0:X1"):
            parse_crop(bad)
    with pytest.raises(ConfigError, match="selects no pixels"):
        parse_crop("10:10,0:5")
    for bad in ("0", "-3", "2.5", "full"):
        with pytest.raises(ConfigError, match="--rank"):
            parse_rank(bad)
