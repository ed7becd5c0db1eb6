"""Running a job: the store's content and metadata, resume, refusal of other settings, failures."""

from __future__ import annotations

import json
import shutil
import warnings
from pathlib import Path

import jsonschema
import numpy as np
import pytest
import tifffile
import zarr
from jobdata import N_FRAMES, assert_bit_identical, chain_reference, read_store_arrays, read_volumes
from ome_zarr.io import parse_url
from ome_zarr.reader import Reader
from ome_zarr_models.v05 import Image

import volrecon
from volrecon.errors import (
    ConfigError,
    FrameOffsetWarning,
    InputFileError,
    ShapeError,
    StoreLockedError,
    StoreMismatchError,
)
from volrecon.pipeline import (
    JobStore,
    StoreLock,
    format_status,
    load_job,
    run_job,
    store_status,
)
from volrecon.pipeline.store import STATUS_DONE, STATUS_FAILED, STATUS_PENDING


def test_store_equals_direct_solver_calls_and_is_valid_ome_zarr(job_files):
    job = load_job(job_files.write_job(output={"max_projections": True}))
    result = run_job(job)
    assert (result.done, result.total, result.failed, result.computed) == (12, 12, 0, 12)
    store = job.output_path
    volumes = read_volumes(store)
    # Reference: the solver called frame by frame on the dark-subtracted frames, warm-started
    # in chains of chain_frames = 3 with lead_in_frames = 1; the pipeline adds no maths.
    frames = job_files.raw.astype(np.float32) - job_files.dark.astype(np.float32)
    solver = {"method": "admm", "iterations": 8, "tv": 1e-3, "tol": 0.0}
    reference = chain_reference(frames, job_files.model, solver, chain=3, lead_in=1)
    expected = np.stack([reference[t] for t in range(len(frames))])
    np.testing.assert_array_equal(volumes, expected)
    # Published standard: OME-NGFF 0.5 (ome-zarr-models), and ome-zarr-py's reader.
    image = Image.from_zarr(zarr.open_group(store, mode="r"))
    scale = image.attributes.ome.multiscales[0].datasets[0].coordinateTransformations[0].scale
    assert scale == [0.05, 2.0, 0.65, 0.65]
    node = next(iter(Reader(parse_url(str(store)))()))
    np.testing.assert_array_equal(np.asarray(node.data[0]), volumes)
    assert [a["unit"] for a in node.metadata["axes"]] == ["second"] + ["micrometer"] * 3
    # Diagnostics, projections (reference: numpy max), provenance.
    group = zarr.open_group(store, mode="r")
    assert (group["diagnostics/status"][:] == STATUS_DONE).all()
    assert (group["diagnostics/iterations"][:] == 8).all()
    assert np.isfinite(group["diagnostics/residual"][:]).all()
    np.testing.assert_array_equal(group["projections/max_z"][:], volumes.max(axis=1))
    np.testing.assert_array_equal(group["projections/max_x"][:], volumes.max(axis=3))
    attributes = group.attrs["volrecon"]
    assert attributes["state"] == "ready" and attributes["settings"]["solver"]["iterations"] == 8
    assert set(attributes["fingerprints"]) == {"model.path", "video.path", "video.dark"}
    assert attributes["provenance"]["volrecon_version"] == volrecon.__version__
    # The store's attributes follow their published JSON Schema (2020-12).
    schema = json.loads((Path(volrecon.__file__).parent / "schemas" /
                         "output-store.schema.json").read_text())
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.validate(dict(group.attrs), schema, cls=jsonschema.Draft202012Validator)
    (run,) = attributes["runs"]
    assert run["outcome"] == "complete" and run["frames_done_after"] == N_FRAMES
    assert run["ended_epoch_s"] >= run["started_epoch_s"]


def test_second_run_computes_nothing_and_partial_resume_is_bit_identical(job_files):
    job = load_job(job_files.write_job(solver={"chain_frames": 4},
                                       compute={"frames_per_task": 8}))
    run_job(job)
    reference = read_store_arrays(job.output_path)
    again = run_job(job)
    assert again.computed == 0 and again.done == N_FRAMES
    # Simulate a run stopped inside a task: frames 5 and 6 (mid-chain [4, 8)) lost their
    # marks and hold garbage; 10 and 11 too (the last chain). A resume with other [compute]
    # settings redoes exactly those chains.
    store = JobStore.open(job.output_path)
    status = store.status()
    status[[5, 6, 10, 11]] = STATUS_PENDING
    store._diagnostics["status"][:] = status
    store.image[5] = np.full(store.image.shape[1:], 7.0, np.float32)
    resumed = run_job(job.with_compute(scheduler="synchronous", workers=1, frames_per_task=1))
    assert resumed.computed == 8  # chains [4, 8) and [8, 12), whole
    assert_bit_identical(read_store_arrays(job.output_path), reference)


def test_changed_settings_refused_and_store_untouched(job_files):
    run_job(load_job(job_files.write_job()))
    store = job_files.folder / "out.zarr"
    before = (store / "zarr.json").read_bytes()
    with pytest.raises(StoreMismatchError,
                       match=r"setting 'solver\.iterations' is 8 in the store but 9 .*--restart"):
        run_job(load_job(job_files.write_job(solver={"iterations": 9})))
    with pytest.raises(StoreMismatchError, match=r"setting 'solver\.warm_start' is true"):
        run_job(load_job(job_files.write_job(solver={"warm_start": False})))
    with pytest.raises(StoreMismatchError, match=r"setting 'video\.frames' is \[0, 12\]"):
        run_job(load_job(job_files.write_job(video={"frames": [0, 11]})))
    # Same name, other content: the fingerprint notices.
    raw = job_files.raw.copy()
    raw[3, 0, 0] += 1
    tifffile.imwrite(job_files.folder / "raw.tif", raw, photometric="minisblack")
    with pytest.raises(StoreMismatchError, match=r"file behind 'video\.path'"):
        run_job(load_job(job_files.write_job()))
    assert (store / "zarr.json").read_bytes() == before
    # [compute] may change freely, and [0, 12] is the whole video as before:
    tifffile.imwrite(job_files.folder / "raw.tif", job_files.raw, photometric="minisblack")
    same = job_files.write_job(compute={"workers": 1}, video={"frames": [0, 12]})
    assert run_job(load_job(same)).computed == 0


def test_restart_validates_before_wiping(job_files):
    run_job(load_job(job_files.write_job()))
    store = job_files.folder / "out.zarr"
    before = read_store_arrays(store)
    bad = load_job(job_files.write_job(solver={"iterations": 9}, video={"frames": [0, 99]}))
    with pytest.raises(ConfigError, match=r"video\.frames.*has 12"):
        run_job(bad, restart=True)
    assert_bit_identical(read_store_arrays(store), before)
    redone = run_job(load_job(job_files.write_job(solver={"iterations": 9})), restart=True)
    assert redone.computed == N_FRAMES
    assert zarr.open_group(store, mode="r").attrs["volrecon"]["settings"]["solver"][
        "iterations"] == 9


def test_foreign_output_folder_never_deleted(job_files):
    foreign = job_files.folder / "out.zarr"
    foreign.mkdir()
    (foreign / "thesis.txt").write_text("precious")
    for restart in (False, True):
        with pytest.raises(ConfigError, match="not a volrecon output store"):
            run_job(load_job(job_files.write_job()), restart=restart)
    assert (foreign / "thesis.txt").read_text() == "precious"


def test_locked_store_refused(job_files):
    job = load_job(job_files.write_job())
    with StoreLock(job.output_path), pytest.raises(StoreLockedError, match="another run"):
        run_job(job)
    assert not job.output_path.exists()


def test_interrupted_creation_is_redone(job_files):
    job = load_job(job_files.write_job())
    run_job(job)
    meta = job.output_path / "zarr.json"
    document = json.loads(meta.read_text())
    document["attributes"]["volrecon"]["state"] = "creating"
    meta.write_text(json.dumps(document))
    assert store_status(job.output_path).done == 0
    assert run_job(job).computed == N_FRAMES


def test_shape_mismatch_refused_before_any_write(job_files):
    tifffile.imwrite(job_files.folder / "big.tif", np.repeat(np.repeat(job_files.raw, 2, 1), 2, 2))
    job = load_job(job_files.write_job(video={"path": "big.tif", "dark": None}))
    with pytest.raises(ShapeError, match=r"set \[video\] binning = 2"):
        run_job(job)
    assert not job.output_path.exists()
    # Reference: binning 2 of a 2x2-repeated video gives back the original pixels exactly.
    # Both without the dark: the camera offset of 100 counts stays in both alike (and the
    # plain video's flat pedestal is reported).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FrameOffsetWarning)
        binned = run_job(load_job(job_files.write_job(video={"path": "big.tif", "dark": None,
                                                             "binning": 2})))
    assert binned.done == N_FRAMES
    plain = load_job(job_files.write_job("plain.toml", video={"dark": None},
                                         output={"path": "plain.zarr"}))
    with pytest.warns(FrameOffsetWarning, match="flat pedestal"):
        run_job(plain)
    np.testing.assert_array_equal(read_volumes(job_files.folder / "out.zarr"),
                                  read_volumes(plain.output_path))


def test_frame_range_glob_and_zarr_inputs_agree(job_files):
    folder = job_files.folder
    (folder / "frames").mkdir()
    for t, frame in enumerate(job_files.raw):
        tifffile.imwrite(folder / "frames" / f"f{t}.tif", frame)
    zarr.create_array(folder / "raw.zarr", data=job_files.raw, chunks=(5, 24, 24))
    outputs = []
    for name, path in (("tif", "raw.tif"), ("glob", "frames/f*.tif"), ("zarr", "raw.zarr")):
        job = load_job(job_files.write_job(f"{name}.toml", video={"path": path, "frames": [3, 9]},
                                           output={"path": f"{name}.zarr"}))
        assert run_job(job).total == 6
        outputs.append(read_volumes(job.output_path))
    np.testing.assert_array_equal(outputs[0], outputs[1])
    np.testing.assert_array_equal(outputs[0], outputs[2])
    with pytest.raises(InputFileError, match="no file matches"):
        run_job(load_job(job_files.write_job(video={"path": "nothing/*.tif"})))


def test_failed_frames_recorded_and_job_continues(job_files):
    frames = job_files.raw.astype(np.float32) - 100
    frames[4, 3, 3] = np.nan
    tifffile.imwrite(job_files.folder / "float.tif", frames)
    job = load_job(job_files.write_job(video={"path": "float.tif", "dark": None}))
    result = run_job(job)
    assert (result.done, result.failed) == (N_FRAMES, 1)
    status = store_status(job.output_path)
    assert status.failures == {4: "the corrected frame contains NaN or Inf pixels"}
    volumes = read_volumes(job.output_path)
    assert np.isnan(volumes[4]).all() and np.isfinite(np.delete(volumes, 4, axis=0)).all()
    # The chain restarts after a failed frame: frame 5 equals a cold start.
    reference = volrecon.reconstruct(frames[5], job_files.model, method="admm", iterations=8,
                                     tv=1e-3, tol=0.0)
    np.testing.assert_array_equal(volumes[5], reference)
    # Divergence: an impossible residual bound fails every frame with its reason.
    strict = load_job(job_files.write_job("strict.toml", solver={"max_residual": 1e-9},
                                          output={"path": "strict.zarr"}))
    assert run_job(strict).failed == N_FRAMES
    group = zarr.open_group(strict.output_path, mode="r")
    assert (group["diagnostics/status"][:] == STATUS_FAILED).all()
    assert "reaches max_residual" in group["diagnostics"].attrs["failures"]["0"]


def test_gpu_refused_before_any_write_without_one(job_files):
    from volrecon.backend import get_backend
    from volrecon.errors import BackendError

    try:
        get_backend("gpu")
    except BackendError:
        pass
    else:
        pytest.skip("a GPU is available here")
    job = load_job(job_files.write_job(compute={"device": "gpu"}))
    with pytest.raises(BackendError, match="gpu"):
        run_job(job)
    assert not job.output_path.exists()


def test_moved_store_keeps_working(job_files, tmp_path):
    job = load_job(job_files.write_job())
    run_job(job)
    shutil.move(job.output_path, tmp_path / "moved.zarr")
    assert store_status(tmp_path / "moved.zarr").state == "complete"


def test_temporal_windows_resume_bit_identical_under_any_compute(job_files):
    # The temporal prior inside chains of 6 after a lead-in of 1, windows of 3: the store
    # equals the solver called window by window on the frames (window plan from the frames
    # alone), a resume after lost marks redoes whole chains bit-identically, and [compute]
    # changes nothing.
    solver = {"chain_frames": 6, "temporal_window": 3, "temporal_weight": 0.05}
    job = load_job(job_files.write_job(solver=solver, compute={"frames_per_task": 6}))
    run_job(job)
    reference = read_store_arrays(job.output_path)
    frames = job_files.raw.astype(np.float32) - job_files.dark.astype(np.float32)
    expected = {}
    for chain in (0, 6):
        first = max(0, chain - 1)
        state = None
        chain_frames = frames[first:chain + 6]
        for start, stop in volrecon.solvers.plan_windows(chain_frames, 3):
            volumes, infos = volrecon.solvers.reconstruct_window(
                chain_frames[start:stop], job_files.model, iterations=8, tv=1e-3, tol=0.0,
                temporal_weight=0.05, init=state)
            state = infos[-1].state
            for k in range(stop - start):
                if first + start + k >= chain:
                    expected[first + start + k] = volumes[k]
    np.testing.assert_array_equal(reference["0"], np.stack([expected[t] for t in range(12)]))
    store = JobStore.open(job.output_path)
    status = store.status()
    status[[7, 8]] = STATUS_PENDING
    store._diagnostics["status"][:] = status
    resumed = run_job(job.with_compute(scheduler="synchronous", workers=1, frames_per_task=1))
    assert resumed.computed == 6
    assert_bit_identical(read_store_arrays(job.output_path), reference)


def test_lead_in_seconds_counted_on_the_chains_first_frame(job_files):
    # Chains of 3 after a lead-in of 1 (the default job): frames 2, 5 and 8 are solved as
    # lead-ins of the chains starting at 3, 6 and 9. Frame 6's input is not finite, so its own
    # solve never runs: what it records is exactly the lead-in solve of frame 5. Frame 4 fails
    # the same way mid-chain and records no time at all.
    frames = job_files.raw.astype(np.float32) - 100
    frames[[4, 6], 3, 3] = np.nan
    tifffile.imwrite(job_files.folder / "float.tif", frames)
    job = load_job(job_files.write_job(video={"path": "float.tif", "dark": None}))
    assert run_job(job).failed == 2
    seconds = zarr.open_group(job.output_path, mode="r")["diagnostics/seconds"][:]
    assert np.isnan(seconds[4]) and seconds[6] > 0
    assert np.isfinite(np.delete(seconds, 4)).all()
    # `volrecon status` shows their sum (reference: numpy's nansum of the stored array).
    status = store_status(job.output_path)
    assert status.solve_seconds == pytest.approx(np.nansum(seconds, dtype=np.float64))
    (line,) = [line for line in format_status(status) if line.startswith("solve time: ")]
    assert "summed over the 12 finished frames" in line and "lead-in" in line
