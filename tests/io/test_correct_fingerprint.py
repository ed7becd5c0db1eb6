"""Camera corrections against their textbook formula and scikit-image, and fingerprints."""

from __future__ import annotations

import numpy as np
import pytest
from skimage.measure import block_reduce

from volrecon.errors import DataError, ShapeError
from volrecon.io import FrameCorrection, fingerprint_file, fingerprint_tree


def test_dark_flat_binning_formula(rng):
    raw = rng.uniform(100, 4000, (3, 8, 12)).astype(np.float32)
    dark = rng.uniform(90, 110, (8, 12)).astype(np.float32)
    flat = rng.uniform(800, 1200, (8, 12)).astype(np.float32)
    corr = FrameCorrection.build(dark_yx=dark, flat_yx=flat, binning=2)
    got = corr.apply(raw)
    # Reference: flat-field correction (raw - dark) / ((flat - dark) / mean(flat - dark)),
    # then 2x2 block means computed by scikit-image's block_reduce, in float64.
    gain = (flat.astype(np.float64) - dark) / np.mean(flat.astype(np.float64) - dark)
    expected = block_reduce((raw - dark.astype(np.float64)) / gain, (1, 2, 2), np.mean)
    assert got.dtype == np.float32 and got.shape == (3, 4, 6)
    # float32 arithmetic on values ~1e3: a few ulps relative.
    np.testing.assert_allclose(got, expected, rtol=1e-5)
    assert raw.dtype == np.float32 and not np.shares_memory(got, raw)


def test_no_correction_is_a_float32_copy(rng):
    raw = rng.integers(0, 65535, (2, 5, 5), dtype=np.uint16)
    out = FrameCorrection().apply(raw)
    assert out.dtype == np.float32
    np.testing.assert_array_equal(out, raw.astype(np.float32))


def test_bad_calibration_refused(rng):
    dark = np.zeros((4, 4), np.float32)
    with pytest.raises(DataError, match="zero or negative"):
        FrameCorrection.build(dark_yx=dark + 5, flat_yx=np.full((4, 4), 5.0), name_flat="f.tif")
    with pytest.raises(ShapeError, match=r"f\.tif"):
        FrameCorrection.build(dark_yx=dark, flat_yx=np.ones((4, 5)), name_flat="f.tif")
    with pytest.raises(DataError, match="NaN"):
        FrameCorrection.build(dark_yx=np.full((4, 4), np.nan))
    corr = FrameCorrection.build(dark_yx=dark, binning=3)
    with pytest.raises(ShapeError, match="dark/flat"):
        corr.check_shape((5, 5), where="raw.tif")
    with pytest.raises(ShapeError, match="cannot be binned by 3"):
        FrameCorrection(binning=3).check_shape((4, 6), where="raw.tif")


def test_file_fingerprint_content_not_name(tmp_path, rng):
    data = rng.bytes(5 << 20)  # > 3 MiB: the sampled method
    (tmp_path / "a.bin").write_bytes(data)
    (tmp_path / "b.bin").write_bytes(data)
    fp = fingerprint_file(tmp_path / "a.bin")
    assert fp.startswith("sha256-sampled:") and fp == fingerprint_file(tmp_path / "b.bin")
    for offset in (10, len(data) // 2, len(data) - 10):  # head, middle and tail are sampled
        changed = bytearray(data)
        changed[offset] ^= 0xFF
        (tmp_path / "c.bin").write_bytes(bytes(changed))
        assert fingerprint_file(tmp_path / "c.bin") != fp
    (tmp_path / "d.bin").write_bytes(data + b"x")
    assert fingerprint_file(tmp_path / "d.bin") != fp


def test_small_file_hashed_whole(tmp_path):
    import hashlib

    (tmp_path / "s.bin").write_bytes(b"abc")
    # Reference: hashlib over the 8-byte little-endian size and the contents.
    expected = hashlib.sha256((3).to_bytes(8, "little") + b"abc").hexdigest()
    assert fingerprint_file(tmp_path / "s.bin") == f"sha256:{expected}"


def test_tree_fingerprint(tmp_path):
    (tmp_path / "m" / "k").mkdir(parents=True)
    (tmp_path / "m" / "zarr.json").write_text("{}")
    (tmp_path / "m" / "k" / "c").write_bytes(b"\x00\x01")
    fp = fingerprint_tree(tmp_path / "m")
    (tmp_path / "m" / "k" / "c.1234.partial").write_bytes(b"junk")
    assert fingerprint_tree(tmp_path / "m") == fp
    (tmp_path / "m" / "k" / "c").write_bytes(b"\x00\x02")
    assert fingerprint_tree(tmp_path / "m") != fp
