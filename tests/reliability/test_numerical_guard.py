"""Numerical guard: a frame with NaN or Inf pixels, or one that makes the solver diverge, is
stored as NaN with its reason, the job goes on, and `volrecon status` lists it."""

from __future__ import annotations

import numpy as np
import tifffile
import zarr
from jobdata import chain_reference
from reliability_tools import one_error_line

from volrecon.cli import main
from volrecon.pipeline.store import STATUS_DONE, STATUS_FAILED

SOLVER = {"method": "admm", "iterations": 8, "tv": 1e-3, "tol": 0.0}
BAD_INPUT = "the corrected frame contains NaN or Inf pixels"
DIVERGED = "diverged: the volume or objective is NaN or Inf"


def test_bad_frames_marked_failed_and_the_job_goes_on(job_copy, capsys):
    frames = job_copy.raw.astype(np.float32) - 100
    frames[2, 4, 4] = np.nan  # a dead pixel read out as NaN
    frames[5, 10, 3] = np.inf  # a saturated float conversion
    frames[7] = 3e38  # finite, but the solver's arithmetic overflows: divergence
    tifffile.imwrite(job_copy.folder / "glitchy.tif", frames, photometric="minisblack")
    job = job_copy.write_job("glitchy.toml", video={"path": "glitchy.tif", "dark": None},
                             solver=SOLVER, output={"path": "glitchy.zarr",
                                                    "max_projections": True})
    store = job_copy.folder / "glitchy.zarr"

    assert main(["run", str(job), "--no-progress"]) == 1  # finished, with failed frames
    out, err = capsys.readouterr()
    assert "12/12 frames done, 3 failed" in out
    line = one_error_line(err, "run")
    assert f"3 of 12 frames failed (first: frame 2: {BAD_INPUT})" in line
    assert f"'volrecon status {store}' lists them" in line

    assert main(["status", str(store)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[:3] == ["12/12", "state: complete", "failed: 3 frames"]
    assert lines[3:6] == [f"  frame 2: {BAD_INPUT}", f"  frame 5: {BAD_INPUT}",
                          f"  frame 7: {DIVERGED}"]

    group = zarr.open_group(store, mode="r")
    status = group["diagnostics/status"][:]
    failed = {2, 5, 7}
    assert set(np.flatnonzero(status == STATUS_FAILED)) == failed
    assert (np.delete(status, sorted(failed)) == STATUS_DONE).all()
    assert group["diagnostics"].attrs["failures"] == {"2": BAD_INPUT, "5": BAD_INPUT,
                                                       "7": DIVERGED}
    volumes = group["0"][:]
    for t in range(len(frames)):
        if t in failed:
            assert np.isnan(volumes[t]).all() and np.isnan(group["projections/max_z"][t]).all()
    # Every other frame is exactly what the solver gives (reference: volrecon.reconstruct
    # called frame by frame with the job's chain rule), so a failure disturbs nothing else.
    expected = chain_reference(frames, job_copy.model, SOLVER, chain=3, lead_in=1,
                               failed=frozenset(failed))  # the job's chain_frames, lead_in_frames
    for t, volume in expected.items():
        np.testing.assert_array_equal(volumes[t], volume, err_msg=f"frame {t}")
    # The diverged frame's diagnostics are kept (they show what happened); the bad-input
    # frames never reached the solver.
    assert group["diagnostics/iterations"][7] > 0
    assert group["diagnostics/iterations"][2] == 0

    # Running the job again computes nothing and reports the same failures.
    assert main(["run", str(job), "--no-progress"]) == 1
    out, err = capsys.readouterr()
    assert "this run computed 0 frames" in out and "3 of 12 frames failed" in err


def test_divergence_raises_no_warning_through_the_library(job_copy):
    """Under pytest warnings are errors: a diverging frame used to abort the whole job with
    numpy's RuntimeWarning (overflow) instead of being marked failed."""
    from volrecon.pipeline import load_job, run_job

    frames = job_copy.raw.astype(np.float32) - 100
    frames[4] = 3e38
    tifffile.imwrite(job_copy.folder / "hot.tif", frames, photometric="minisblack")
    job = load_job(job_copy.write_job("hot.toml", video={"path": "hot.tif", "dark": None},
                                      output={"path": "hot.zarr"}))
    result = run_job(job)
    assert (result.done, result.failed) == (12, 1)
    assert zarr.open_group(job.output_path, mode="r")["diagnostics"].attrs["failures"] == {
        "4": DIVERGED}
