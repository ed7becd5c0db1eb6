"""The reader: stores → lazy layer data with physical scale (no Qt needed)."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import zarr
from dask.callbacks import Callback
from napari_stores import (
    DEPTH_START_UM,
    FAILED_FRAME,
    FINISHED,
    N_FRAMES,
    SCALE_TZYX,
    SHAPE_ZYX,
    gaussian_psf,
    make_output_store,
)

from volrecon.errors import InputFileError, ModelStoreError
from volrecon.models import DepthConvolutionPSF, FieldVaryingPSF, Geometry, LowRankDepthPSF
from volrecon.napari.reader import get_reader
from volrecon.napari.stores import model_store_layers, output_store_layers, store_kind


class TaskCounter(Callback):
    """Counts dask tasks executed while active, and the keys of those of one array."""

    def __init__(self, name: str = "") -> None:
        super().__init__()
        self.name = name
        self.tasks = 0
        self.keys: set[tuple] = set()

    def _pretask(self, key, dsk, state):
        self.tasks += 1
        if self.name and isinstance(key, tuple) and key[0] == self.name:
            self.keys.add(key)


def test_reader_gives_lazy_4d_layer_with_physical_scale(output_store):
    reader = get_reader(str(output_store.path))
    assert reader is not None
    with TaskCounter() as counter:
        layers = reader(str(output_store.path))
    # Opening computes nothing through dask (the one frame read for the contrast limits
    # goes straight to zarr, and only that frame's projection).
    assert counter.tasks == 0
    data, kwargs, kind = layers[0]
    assert kind == "image" and isinstance(data, da.Array)
    assert data.shape == (N_FRAMES, *SHAPE_ZYX) and data.dtype == np.float32
    assert data.chunks[0] == (1,) * N_FRAMES  # one frame per chunk, as the store is chunked
    # Reference: the scale and depth offset the store was created with (conftest).
    assert kwargs["scale"] == list(SCALE_TZYX)
    assert kwargs["translate"] == [0.0, DEPTH_START_UM, 0.0, 0.0]
    assert kwargs["axis_labels"] == ["t", "z", "y", "x"]
    assert kwargs["units"] == ["second", "micrometer", "micrometer", "micrometer"]
    low, high = kwargs["contrast_limits"]
    done = [t for t in range(FINISHED) if t != FAILED_FRAME]
    # The limits come from one finished frame: (0, its max), within the data's range.
    assert low == 0.0 and np.nanmax(output_store.volumes[done[0]]) <= high
    assert high <= np.nanmax(output_store.volumes)
    # Values are the written ones; pending and failed frames read as NaN (the fill value).
    np.testing.assert_array_equal(data[3].compute(), output_store.volumes[3])
    assert np.isnan(data[FAILED_FRAME].compute()).all()
    assert np.isnan(data[N_FRAMES - 1].compute()).all()


def test_viewer_model_reads_only_the_displayed_frame(output_store):
    from napari.components import ViewerModel

    data, kwargs, _ = output_store_layers(output_store.path)[0]
    viewer = ViewerModel()
    with TaskCounter(data.name) as counter:
        layer = viewer.add_image(data, **kwargs)
    # One frame is one chunk. napari 0.9 reads frame 0 while building the layer and then the
    # frame on screen (the middle one): two chunks, never the other frames, so a 100 GB
    # store opens as fast as this one.
    assert len(counter.keys) <= 2
    assert {key[1] for key in counter.keys} <= {0, viewer.dims.current_step[0]}
    assert tuple(layer.scale) == SCALE_TZYX and layer.data.dtype == np.float32
    assert viewer.dims.axis_labels == ("t", "z", "y", "x")


def test_projection_layers_match_numpy_max_and_cover_the_volume(output_store):
    layers = output_store_layers(output_store.path)
    by_name = {kwargs["name"]: (data, kwargs) for data, kwargs, _ in layers}
    volumes = output_store.volumes
    t = 3
    for key, axis in (("max_z", 1), ("max_y", 2), ("max_x", 3)):
        data, kwargs = by_name[f"volumes {key}"]
        assert kwargs["visible"] is False and data.shape[axis] == 1
        # Reference: numpy's max over the projected axis of the frame written.
        np.testing.assert_array_equal(data[t].compute(),
                                      np.max(volumes[t], axis=axis - 1, keepdims=True))
        # The single plane spans the volume's extent along that axis: same centre, same width.
        n, step, start = SHAPE_ZYX[axis - 1], SCALE_TZYX[axis], [0, DEPTH_START_UM, 0, 0][axis]
        centre = start + step * (n - 1) / 2
        assert kwargs["translate"][axis] == pytest.approx(centre)
        assert kwargs["scale"][axis] == pytest.approx(step * n)


def test_store_without_projections_has_one_layer(tmp_path, rng):
    store = make_output_store(tmp_path / "plain.zarr", rng, projections=False)
    layers = output_store_layers(store.path)
    assert len(layers) == 1 and layers[0][1]["name"] == "plain"


def test_store_with_no_finished_frame_has_default_limits(tmp_path):
    from volrecon.pipeline.store import JobStore

    JobStore.create(tmp_path / "empty.zarr", shape_zyx=SHAPE_ZYX, n_frames=4,
                    scale_tzyx=SCALE_TZYX, metadata={})
    _, kwargs, _ = output_store_layers(tmp_path / "empty.zarr")[0]
    assert kwargs["contrast_limits"] == (0.0, 1.0)


def _model(kind: str, rng: np.random.Generator):
    geometry = Geometry(SCALE_TZYX[1], SCALE_TZYX[2], DEPTH_START_UM)
    nz, ny, nx = SHAPE_ZYX
    if kind == "depth-low-rank":
        return LowRankDepthPSF(rng.random((2, ny, nx), dtype=np.float32),
                               rng.random((nz, 2), dtype=np.float32), geometry)
    kernels = np.stack([gaussian_psf(SHAPE_ZYX), gaussian_psf(SHAPE_ZYX)[:, ::-1]], axis=1)
    return FieldVaryingPSF.from_positions(kernels, [[4.0, 4.0], [15.0, 20.0]], geometry)


def test_full_rank_model_store_is_a_3d_psf_image(model_store):
    reader = get_reader(str(model_store))
    assert reader is not None
    (data, kwargs, _), = reader(str(model_store))
    assert isinstance(data, da.Array) and data.shape == SHAPE_ZYX
    # Reference: the PSF stack the model was saved from.
    np.testing.assert_array_equal(data.compute(), gaussian_psf(SHAPE_ZYX))
    assert kwargs["scale"] == [SCALE_TZYX[1], SCALE_TZYX[2], SCALE_TZYX[2]]
    assert kwargs["translate"] == [DEPTH_START_UM, 0.0, 0.0]
    assert kwargs["axis_labels"] == ["z", "y", "x"]


def test_low_rank_model_store_gives_expanded_stack_and_kernels(tmp_path, rng):
    model = _model("depth-low-rank", rng)
    model.save(tmp_path / "lowrank")
    assert store_kind(tmp_path / "lowrank") == "model"
    (stack, stack_kwargs, _), (kernels, kernel_kwargs, _) = model_store_layers(
        tmp_path / "lowrank")
    # Reference: numpy's einsum of the weights and kernels given to the model (h_z = Σ U g).
    expected = np.einsum("zr,ryx->zyx", model.weights_zr.astype(np.float64),
                         model.kernels_ryx.astype(np.float64))
    # float32 sums of 2 products of numbers in [0, 1): rounding ~1e-7 relative.
    np.testing.assert_allclose(stack.compute(), expected, rtol=1e-6)
    assert stack.chunks[0] == (1,) * SHAPE_ZYX[0]  # one plane per chunk, computed on display
    np.testing.assert_array_equal(kernels.compute(), model.kernels_ryx)
    assert kernel_kwargs["visible"] is False and kernel_kwargs["axis_labels"][0] == "kernel"
    assert stack_kwargs["scale"][0] == SCALE_TZYX[1]


def test_field_varying_model_store_gives_one_stack_per_position(tmp_path, rng):
    model = _model("field-varying", rng)
    model.save(tmp_path / "field.zarr")
    (data, kwargs, _), = model_store_layers(tmp_path / "field.zarr")
    # Reference: the saved kernels (Z, K, Y, X) with the position axis moved first.
    np.testing.assert_array_equal(data.compute(), np.moveaxis(model.kernels_zkyx, 1, 0))
    assert kwargs["axis_labels"] == ["field position", "z", "y", "x"]


@pytest.mark.parametrize("kind", ["depth-convolution", "depth-low-rank", "field-varying"])
def test_model_layers_show_the_recorded_throughput(tmp_path, rng, kind):
    # Known truth: the throughput per field position and plane written into the model's
    # calibration metadata, as calibration writes it ((K, Z) relative to the brightest).
    nz = SHAPE_ZYX[0]
    rows = 2 if kind == "field-varying" else 1
    table = rng.uniform(0.3, 1.0, (rows, nz))
    table[0, 1] = 0.2  # the dimmest plane: plane 1
    table[:, 0] = 1.0  # the brightest plane, at every position
    calibration = {"throughput": table.tolist()}
    geometry = Geometry(SCALE_TZYX[1], SCALE_TZYX[2], DEPTH_START_UM)
    if kind == "depth-convolution":
        model = DepthConvolutionPSF(gaussian_psf(SHAPE_ZYX), geometry, calibration=calibration)
    elif kind == "depth-low-rank":
        _, ny, nx = SHAPE_ZYX
        model = LowRankDepthPSF(rng.random((2, ny, nx), dtype=np.float32),
                                rng.random((nz, 2), dtype=np.float32), geometry,
                                calibration=calibration)
    else:
        kernels = np.stack([gaussian_psf(SHAPE_ZYX), gaussian_psf(SHAPE_ZYX)[:, ::-1]], axis=1)
        model = FieldVaryingPSF.from_positions(kernels, [[4.0, 4.0], [15.0, 20.0]], geometry,
                                               calibration=calibration)
    model.save(tmp_path / "m.zarr")
    (_, kwargs, _), *_ = model_store_layers(tmp_path / "m.zarr")
    per_plane = table.min(axis=0)  # lowest over the field positions
    np.testing.assert_allclose(kwargs["metadata"]["volrecon_throughput"], per_plane)
    assert kwargs["name"].endswith("(throughput 0.20-1.00)")
    summary = kwargs["metadata"]["volrecon_throughput_summary"]
    assert summary.startswith("relative throughput per plane")
    assert f"dimmest plane 1 ({DEPTH_START_UM + SCALE_TZYX[1]:g} um)" in summary
    assert ("lowest of 2 PSFs" in summary) == (rows == 2)
    assert " ".join(f"{v:.2f}" for v in per_plane) in summary


def test_model_layers_say_when_no_throughput_is_recorded(make_napari_viewer, volrecon_plugin,
                                                         model_store):
    viewer = make_napari_viewer(show=False)
    viewer.open(str(model_store), plugin="volrecon")
    layer, = viewer.layers
    # The napari layer keeps the metadata: a model from PSFModel.from_stack records none.
    assert layer.metadata["volrecon_throughput"] is None
    assert "not recorded" in layer.metadata["volrecon_throughput_summary"]
    assert layer.name == f"{model_store.stem} PSF"


def test_model_store_of_unknown_kind_is_refused(model_store):
    meta = json.loads((model_store / "zarr.json").read_text())
    meta["attributes"]["volrecon_model"]["kind"] = "hologram"
    (model_store / "zarr.json").write_text(json.dumps(meta))
    with pytest.raises(ModelStoreError, match="'hologram', which this viewer cannot show"):
        model_store_layers(model_store)


def test_model_store_missing_an_array_is_refused(tmp_path, model_store):
    import shutil

    shutil.rmtree(model_store / "psf")
    with pytest.raises(ModelStoreError, match="lacks array 'psf'"):
        model_store_layers(model_store)


@pytest.mark.parametrize(("edit", "match"), [
    ("truncate", r"metadata \(zarr\.json\) is damaged \(JSONDecodeError\)"),
    ("kind", r"'volrecon_model/kind' is \[\], not a name"),
    ("dtype", r"'volrecon_model/dtype' is 32, not a dtype name"),
    ("version", r"format_version 2 is not supported"),
])
def test_damaged_model_store_is_refused_with_the_reason(model_store, edit, match):
    meta_file = model_store / "zarr.json"
    if edit == "truncate":
        meta_file.write_text(meta_file.read_text()[:-5])
    else:
        meta = json.loads(meta_file.read_text())
        value = {"kind": [], "dtype": 32, "version": 2}[edit]
        meta["attributes"]["volrecon_model"]["format_version" if edit == "version" else edit] = (
            value)
        meta_file.write_text(json.dumps(meta))
    with pytest.raises(ModelStoreError, match=match):
        model_store_layers(model_store)


def test_output_store_with_damaged_metadata_is_refused_not_ignored(output_store):
    meta_file = output_store.path / "zarr.json"
    meta_file.write_text(meta_file.read_text()[:-5])
    assert store_kind(output_store.path) is None  # the reader probe stays quiet
    with pytest.raises(InputFileError, match=r"zarr\.json: not readable as zarr v3 group"):
        output_store_layers(output_store.path)


def test_ome_metadata_of_another_version_is_refused(output_store):
    meta_file = output_store.path / "zarr.json"
    meta = json.loads(meta_file.read_text())
    meta["attributes"]["ome"]["version"] = "0.4"
    meta_file.write_text(json.dumps(meta))
    with pytest.raises(InputFileError, match=r"'ome/version' is '0\.4', not '0\.5'"):
        output_store_layers(output_store.path)


@pytest.mark.parametrize("damage", ["no_multiscales", "short_scale", "no_image"])
def test_damaged_output_store_names_the_problem(output_store, damage):
    import shutil

    path = output_store.path
    meta = json.loads((path / "zarr.json").read_text())
    if damage == "no_multiscales":
        del meta["attributes"]["ome"]["multiscales"]
        match = "'ome/multiscales' is missing or malformed"
    elif damage == "short_scale":
        meta["attributes"]["ome"]["multiscales"][0]["datasets"][0][
            "coordinateTransformations"][0]["scale"] = [1.0, 1.0]
        match = "needs one scale"
    else:
        shutil.rmtree(path / "0")
        match = "image array '0' is missing"
    (path / "zarr.json").write_text(json.dumps(meta))
    with pytest.raises(InputFileError, match=match):
        output_store_layers(path)


def test_get_reader_declines_other_paths_quietly(tmp_path):
    (tmp_path / "frame.tif").write_bytes(b"II*\x00not really")
    (tmp_path / "empty").mkdir()
    other = zarr.open_group(str(tmp_path / "other.zarr"), mode="w", zarr_format=3)
    other.attrs["something"] = 1
    (tmp_path / "broken.zarr").mkdir()
    (tmp_path / "broken.zarr" / "zarr.json").write_text("{not json")
    candidates = [tmp_path / "frame.tif", tmp_path / "empty", tmp_path / "other.zarr",
                  tmp_path / "broken.zarr", tmp_path / "missing.zarr"]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for path in candidates:
            assert get_reader(str(path)) is None
        assert get_reader([str(tmp_path / "other.zarr")]) is None
        assert get_reader(42) is None  # type: ignore[arg-type]


def test_viewer_opens_a_store_written_by_a_job(tmp_path, volrecon_plugin):
    """End to end without Qt: a real (tiny) job, then napari's open through npe2."""
    import tifffile
    from napari.components import ViewerModel

    import volrecon
    from volrecon.pipeline import job_from_dict, run_job

    model = volrecon.PSFModel.from_stack(gaussian_psf(SHAPE_ZYX), depth_step_um=2.0,
                                         pixel_size_um=0.65)
    model.save(tmp_path / "model")
    volume = np.zeros(SHAPE_ZYX, np.float32)
    volume[1, 10, 12] = 500.0
    frames = np.stack([model.forward(np.roll(volume, t, axis=2)) for t in range(4)])
    tifffile.imwrite(tmp_path / "raw.tif", np.round(frames).astype(np.uint16),
                     photometric="minisblack")
    job = job_from_dict({
        "model": {"path": "model"}, "video": {"path": "raw.tif"},
        "solver": {"method": "admm", "iterations": 10},
        "output": {"path": "out.zarr", "time_interval_s": 0.1, "max_projections": True},
        "compute": {"scheduler": "synchronous", "frames_per_task": 2},
    }, base_dir=tmp_path)
    run_job(job)
    viewer = ViewerModel()
    layers = viewer.open(str(tmp_path / "out.zarr"), plugin="volrecon")
    volumes = layers[0]
    assert volumes.data.shape == (4, *SHAPE_ZYX)
    assert tuple(volumes.scale) == pytest.approx((0.1, 2.0, 0.65, 0.65))
    assert [layer.name for layer in layers[1:]] == ["out max_z", "out max_y", "out max_x"]
    written = np.asarray(zarr.open_array(str(tmp_path / "out.zarr"), path="0", mode="r")[...])
    np.testing.assert_array_equal(volumes.data.compute(), written)


def test_store_kind_reads_only_metadata(tmp_path, output_store, model_store):
    assert store_kind(output_store.path) == "output"
    assert store_kind(model_store) == "model"
    assert store_kind(Path(tmp_path / "nothing")) is None
