"""Sanity checks of a job's frames before any work: a foreign dark refused, hot pixels found,
warned about and (``[video] hot_pixels = "repair"``) repaired; the input formats (TIFF parts,
HDF5) reconstructed end to end like one TIFF, and their bad input refused before any write."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import tifffile
import zarr
from jobdata import N_FRAMES, assert_bit_identical, read_store_arrays, read_volumes

from volrecon.errors import ConfigError, DataError, HotPixelWarning, InputFileError
from volrecon.pipeline import load_job, prepare_job, run_job

HOT_YX = np.array([[5, 7], [15, 20]])


def _hot_video(job_files):
    hot = job_files.raw.copy()
    hot[:, HOT_YX[:, 0], HOT_YX[:, 1]] += np.array([500, 300], np.uint16)
    tifffile.imwrite(job_files.folder / "hot.tif", hot)
    return hot


def test_frames_below_the_dark_refused_before_any_write(job_files):
    tifffile.imwrite(job_files.folder / "u8.tif", (job_files.raw // 16).astype(np.uint8))
    tifffile.imwrite(job_files.folder / "dark16.tif", np.full((24, 24), 1600, np.uint16))
    job = load_job(job_files.write_job(video={"path": "u8.tif", "dark": "dark16.tif"}))
    with pytest.raises(DataError, match=r"u8\.tif: 100% of the sampled pixels are below zero "
                                        r"after subtracting the dark .*dark16\.tif"):
        run_job(job)
    assert not job.output_path.exists()


def test_hot_pixels_warned_about_with_their_count(job_files):
    _hot_video(job_files)
    job = load_job(job_files.write_job(video={"path": "hot.tif"}))
    with pytest.warns(HotPixelWarning, match=r"hot\.tif: 2 hot pixels .*first at y=5, x=7.*"
                                             r'hot_pixels = "repair"'):
        prepared = prepare_job(job)
    # Known truth: the two pixels put in.
    np.testing.assert_array_equal(prepared.hot_pixels_yx, HOT_YX)
    assert prepared.correction.hot_pixels_yx is None  # "keep": recorded, not repaired


def test_hot_pixels_repaired_when_asked(job_files):
    hot = _hot_video(job_files)
    job = load_job(job_files.write_job(video={"path": "hot.tif", "hot_pixels": "repair"}))
    result = run_job(job)  # no warning: the user asked for the repair
    assert result.done == N_FRAMES and result.failed == 0
    attributes = zarr.open_group(job.output_path, mode="r").attrs["volrecon"]
    assert attributes["video"]["hot_pixels_yx"] == HOT_YX.tolist()
    # Reference: the frames repaired by hand (median of the 8 neighbours, numpy), then
    # reconstructed by a job without hot pixels, are what the repairing job stored.
    fixed = hot.astype(np.float32)
    for y, x in HOT_YX:
        ring = np.delete(fixed[:, y - 1 : y + 2, x - 1 : x + 2].reshape(N_FRAMES, 9), 4, axis=1)
        fixed[:, y, x] = np.median(ring, axis=1)
    tifffile.imwrite(job_files.folder / "fixed.tif", fixed)
    reference = load_job(job_files.write_job("ref.toml", video={"path": "fixed.tif"},
                                             output={"path": "ref.zarr"}))
    run_job(reference)
    np.testing.assert_allclose(read_volumes(job.output_path), read_volumes(reference.output_path),
                               rtol=1e-5, atol=1e-5)


def test_hot_pixels_key_checked(job_files):
    with pytest.raises(ConfigError, match=r"video\.hot_pixels"):
        load_job(job_files.write_job(video={"hot_pixels": "fix"}))


# ------------------------------------------------------------- input formats, end to end
def _single_tiff_reference(job_files):
    job = load_job(job_files.write_job("single.toml", output={"path": "single.zarr"}))
    run_job(job)
    return read_store_arrays(job.output_path)


def test_tiff_parts_run_bit_identical_to_single_tiff(job_files):
    parts = job_files.folder / "parts"
    parts.mkdir()
    for name, (a, b) in {"rec_2.tif": (0, 5), "rec_10.tif": (5, N_FRAMES)}.items():
        tifffile.imwrite(parts / name, job_files.raw[a:b], photometric="minisblack")
    # Natural order matters: text order would put rec_10 (frames 5:12) first.
    job = load_job(job_files.write_job(video={"path": "parts/rec_*.tif"}))
    run_job(job)
    assert_bit_identical(read_store_arrays(job.output_path), _single_tiff_reference(job_files))


def test_hdf5_run_bit_identical_to_single_tiff(job_files):
    with h5py.File(job_files.folder / "raw.h5", "w") as handle:
        handle.create_dataset("entry/frames", data=job_files.raw, chunks=(4, 24, 24),
                              compression="gzip")
    job = load_job(job_files.write_job(video={"path": "raw.h5", "dataset": "/entry/frames"}))
    run_job(job)
    assert_bit_identical(read_store_arrays(job.output_path), _single_tiff_reference(job_files))


def test_missing_hdf5_dataset_refused_before_any_write(job_files):
    with h5py.File(job_files.folder / "raw.h5", "w") as handle:
        handle["entry/frames"] = job_files.raw
    job = load_job(job_files.write_job(video={"path": "raw.h5", "dataset": "/frames"}))
    with pytest.raises(InputFileError, match=r"raw\.h5: no dataset '/frames' in the file; set "
                                             r"\[video\] dataset to one of its image datasets "
                                             r"\(/entry/frames\)"):
        run_job(job)
    assert not job.output_path.exists()


def test_parts_of_another_frame_size_refused_before_any_write(job_files):
    tifffile.imwrite(job_files.folder / "p_1.tif", job_files.raw[:6])
    tifffile.imwrite(job_files.folder / "p_2.tif", job_files.raw[6:, :, :20])
    job = load_job(job_files.write_job(video={"path": "p_*.tif"}))
    with pytest.raises(InputFileError, match=r"p_2\.tif: holds frames of \(24, 20\) uint16"):
        run_job(job)
    assert not job.output_path.exists()


def test_dataset_key_serves_zarr_and_component_is_its_older_name(job_files):
    group = zarr.open_group(job_files.folder / "raw.zarr", mode="w")
    group.create_array("cam/raw", data=job_files.raw)
    job = load_job(job_files.write_job(video={"path": "raw.zarr", "dataset": "cam/raw"}))
    assert job.video_component == "cam/raw"
    with pytest.warns(FutureWarning, match=r"video\.component' is renamed; write dataset = "
                                           r"'cam/raw'"):
        old = load_job(job_files.write_job("old.toml", video={"path": "raw.zarr",
                                                               "component": "cam/raw"}))
    assert old.video_component == "cam/raw"
    with pytest.raises(ConfigError, match=r"'video\.dataset' and 'video\.component' are both"):
        load_job(job_files.write_job("both.toml", video={"path": "raw.zarr", "dataset": "a",
                                                         "component": "a"}))
