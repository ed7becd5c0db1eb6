"""Multiscale output (OME-NGFF resolution levels written with each frame) and float16 stores."""

from __future__ import annotations

import numpy as np
import pytest
import zarr
from jobdata import N_FRAMES, assert_bit_identical, read_store_arrays

from volrecon.cli import main
from volrecon.io.ome_zarr import (
    downsample_yx,
    level_shape,
    ome_image_attributes,
    parse_ome_image,
    pyramid_levels,
)
from volrecon.pipeline import load_job, run_job
from volrecon.pipeline.store import (
    STATUS_DONE,
    STATUS_FAILED,
    JobStore,
    store_file_count,
)

#: IEEE 754 binary16: unit roundoff 2^-11 (round to nearest), subnormal spacing 2^-24.
FLOAT16_ROUNDOFF, FLOAT16_SUBNORMAL_STEP = 2.0**-11, 2.0**-24


# ------------------------------------------------------------------------------ the levels
@pytest.mark.parametrize("shape", [(3, 8, 12), (2, 64, 64), (16, 6)])
def test_downsampling_is_the_2x2_block_mean_of_scikit_image(shape):
    # Reference: skimage.transform.downscale_local_mean (even sizes: exact 2 x 2 means).
    from skimage.transform import downscale_local_mean

    data = np.random.default_rng(1).random(shape).astype(np.float32)
    expected = downscale_local_mean(data.astype(np.float64), (1,) * (data.ndim - 2) + (2, 2))
    np.testing.assert_allclose(downsample_yx(data), expected, rtol=1e-6)


def test_an_odd_edge_is_averaged_over_the_pixels_it_has():
    data = np.arange(15, dtype=np.float32).reshape(3, 5)
    out = downsample_yx(data)
    assert out.shape == (2, 3)
    # Worked by hand: the last column block holds one column, the last row block one row.
    assert out[0, 2] == (4 + 9) / 2 and out[1, 0] == (10 + 11) / 2 and out[1, 2] == 14


def test_level_count_and_shapes():
    assert [pyramid_levels((n, n)) for n in (24, 64, 65, 128, 512, 1024)] == [1, 1, 2, 2, 4, 5]
    assert level_shape((7, 3, 100, 51), 2) == (7, 3, 25, 13)


def test_each_level_sits_at_the_centre_of_the_block_it_averages():
    # The centre of pixels i = 0 .. 2^k - 1 of level 0 (scale s, translation t0) is
    # t0 + s (2^k - 1) / 2 (the mean of their positions).
    ome = ome_image_attributes(scale_tzyx=(0.1, 2.0, 0.5, 0.25), name="v",
                               translation_tzyx=(0.0, 4.0, 1.0, -3.0), levels=3)
    levels = parse_ome_image({"ome": ome}, source="v.zarr").levels
    for k, level in enumerate(levels):
        assert level.path == str(k)
        assert level.scale == (0.1, 2.0, 0.5 * 2**k, 0.25 * 2**k)
        centre_y = np.mean([1.0 + 0.5 * i for i in range(2**k)])
        centre_x = np.mean([-3.0 + 0.25 * i for i in range(2**k)])
        assert level.translation == pytest.approx((0.0, 4.0, centre_y, centre_x))


# ------------------------------------------------------------------------------ end to end
@pytest.fixture
def pyramid_job(job_files):
    return job_files.write_job(output={"levels": 3, "max_projections": True})


def test_a_job_writes_every_level_and_resumes_them_bit_identically(job_files, pyramid_job):
    from ome_zarr_models.v05 import Image
    from skimage.transform import downscale_local_mean

    run_job(load_job(pyramid_job))
    store = job_files.folder / "out.zarr"
    group = zarr.open_group(store, mode="r")
    # Reference: ome-zarr-models validates the multiscale (3 datasets) against OME-NGFF 0.5.
    Image.from_zarr(group)
    volumes = np.asarray(group["0"][...])
    assert group["1"].shape == (N_FRAMES, 3, 12, 12) and group["2"].shape == (N_FRAMES, 3, 6, 6)
    # Level k is the 2^k x 2^k block mean of level 0 (scikit-image, float64).
    for k in (1, 2):
        expected = downscale_local_mean(volumes.astype(np.float64), (1, 1, 2**k, 2**k))
        np.testing.assert_allclose(group[str(k)][...], expected, rtol=2e-6, atol=1e-6)
    # Frames 3..5 sent back (as verify does): the rerun rewrites their shards in every level.
    reference = {**read_store_arrays(store),
                 **{k: np.asarray(group[k][...]) for k in ("1", "2")}}
    JobStore.open(store).mark_pending(range(3, 6))
    run_job(load_job(pyramid_job))
    again = zarr.open_group(store, mode="r")
    assert_bit_identical({**read_store_arrays(store),
                          **{k: np.asarray(again[k][...]) for k in ("1", "2")}}, reference)
    assert set(JobStore.open(store).frame_arrays()) == {
        "0", "1", "2", "projections/max_z", "projections/max_y", "projections/max_x"}


def test_napari_opens_the_levels_as_one_multiscale_layer(job_files, pyramid_job):
    from napari.components import ViewerModel

    from volrecon.napari.stores import output_store_layers

    run_job(load_job(pyramid_job))
    store = job_files.folder / "out.zarr"
    data, kwargs, _ = output_store_layers(store)[0]
    assert kwargs["multiscale"] and [level.shape[-1] for level in data] == [24, 12, 6]
    layer = ViewerModel().add_image(data, **{k: v for k, v in kwargs.items()
                                             if k != "metadata"})
    assert layer.multiscale and [level.shape for level in layer.data] == [
        (N_FRAMES, 3, 24, 24), (N_FRAMES, 3, 12, 12), (N_FRAMES, 3, 6, 6)]


def test_file_count_and_estimate_include_the_levels(job_files, pyramid_job, capsys):
    run_job(load_job(pyramid_job))
    store = job_files.folder / "out.zarr"
    files = [p for p in store.rglob("*") if p.is_file()]
    bound = store_file_count(N_FRAMES, (3, 24, 24), shard_frames=3, projections=True,
                             levels=3)
    assert len(files) <= bound
    assert len([p for p in files if p.parts[-4] == "c" or p.parts[-5] == "c"]) == 6 * 4
    assert main(["run", str(pyramid_job), "--estimate"]) == 0
    assert f"in at most {bound} files" in capsys.readouterr().out


def test_levels_auto_follows_the_grid(job_files):
    run_job(load_job(job_files.write_job()))  # 24 x 24: one level
    assert len(zarr.open_group(job_files.folder / "out.zarr", mode="r")["0"].shape) == 4
    assert "1" not in zarr.open_group(job_files.folder / "out.zarr", mode="r")


# ------------------------------------------------------------------------------ float16
def test_a_float16_store_equals_float32_within_float16_rounding(job_files):
    run_job(load_job(job_files.write_job(output={"max_projections": True})))
    wide = read_store_arrays(job_files.folder / "out.zarr")
    run_job(load_job(job_files.write_job("half.toml", output={
        "path": "half.zarr", "dtype": "float16", "max_projections": True})))
    half = read_store_arrays(job_files.folder / "half.zarr")
    for key in ("0", "projections/max_z", "projections/max_y", "projections/max_x"):
        assert half[key].dtype == np.float16
        error = np.abs(half[key].astype(np.float64) - wide[key])
        assert (error <= FLOAT16_ROUNDOFF * np.abs(wide[key]) + FLOAT16_SUBNORMAL_STEP).all()
    for key in ("diagnostics/status", "diagnostics/iterations"):
        np.testing.assert_array_equal(half[key], wide[key])
    wide_bytes = sum(p.stat().st_size for p in (job_files.folder / "out.zarr" / "0").rglob("*")
                     if p.is_file())
    half_bytes = sum(p.stat().st_size for p in (job_files.folder / "half.zarr" / "0").rglob(
        "*") if p.is_file())
    assert half_bytes < 0.75 * wide_bytes


def test_a_float16_store_reads_nan_for_frames_not_done(tmp_path):
    store = JobStore.create(tmp_path / "half.zarr", shape_zyx=(2, 8, 8), n_frames=4,
                            scale_tzyx=(1.0, 1.0, 1.0, 1.0), metadata={}, projections=True,
                            shard_frames=2, levels=2, dtype="float16")
    for array in store.frame_arrays().values():
        frame = np.asarray(array[1])
        assert frame.dtype == np.float16 and np.isnan(frame).all()


def test_a_volume_beyond_float16_range_fails_with_its_reason(job_files, tmp_path):
    from jobdata import gaussian_psf

    import volrecon

    dim = volrecon.PSFModel.from_stack(gaussian_psf((3, 24, 24)) / 1000.0, depth_step_um=2.0,
                                       pixel_size_um=0.65)  # volumes 1000x brighter
    dim.save(job_files.folder / "dim_model")
    job = job_files.write_job(model={"path": "dim_model"}, output={"dtype": "float16"})
    run_job(load_job(job))
    store = JobStore.open(job_files.folder / "out.zarr")
    status = store.status()
    assert (status == STATUS_FAILED).any(), status
    reason = next(iter(store.failures().values()))
    assert "float16 range (65504)" in reason and '[output] dtype = "float32"' in reason
    failed = int(np.flatnonzero(status == STATUS_FAILED)[0])
    assert np.isnan(np.asarray(store.image[failed])).all()  # NaN, never inf
    assert not (status == STATUS_DONE).all()


def test_status_names_the_layout(job_files, pyramid_job, capsys):
    run_job(load_job(pyramid_job))
    assert main(["status", str(job_files.folder / "out.zarr")]) == 0
    out = capsys.readouterr().out
    assert "layout: format 3, 3 resolution levels, float32, 3 frames per file" in out
