"""`volrecon run / status / export` end to end, ImageJ export read back with tifffile."""

from __future__ import annotations

import io

import numpy as np
import pytest
import tifffile
from jobdata import N_FRAMES, SHAPE_ZYX, read_volumes

from volrecon.cli import main
from volrecon.errors import ConfigError
from volrecon.pipeline import export_tiff, load_job, progress_bar, run_job


def test_run_status_export_through_the_cli(job_files, capsys):
    job_path = job_files.write_job(output={"max_projections": True})
    assert main(["run", str(job_path)]) == 0
    out = capsys.readouterr().out
    assert f"{N_FRAMES}/{N_FRAMES} frames done, 0 failed" in out and "frames/s" in out
    store = job_files.folder / "out.zarr"

    assert main(["status", str(store)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == f"{N_FRAMES}/{N_FRAMES}"
    assert lines[1] == "state: complete" and lines[2] == "failed: 0 frames"
    assert lines[3].startswith("throughput: ")

    volumes = read_volumes(store)
    tiff = job_files.folder / "v.tif"
    assert main(["export", str(store), "--tiff", str(tiff), "--frames", "2:5"]) == 0
    capsys.readouterr()
    # Reference: tifffile's own ImageJ reader.
    with tifffile.TiffFile(tiff) as tf:
        assert tf.is_imagej and tf.series[0].axes == "TZYX"
        np.testing.assert_array_equal(tf.asarray(), volumes[2:5])
        meta = tf.imagej_metadata
        assert (meta["frames"], meta["slices"]) == (3, SHAPE_ZYX[0])
        assert meta["spacing"] == 2.0 and meta["finterval"] == 0.05 and meta["unit"] == "um"
        x_res = tf.pages[0].tags["XResolution"].value
        assert x_res[0] / x_res[1] == pytest.approx(1 / 0.65, rel=1e-6)
    projection = job_files.folder / "p.tif"
    assert main(["export", str(store), "--tiff", str(projection), "--projection", "max"]) == 0
    with tifffile.TiffFile(projection) as tf:
        assert tf.series[0].axes == "TYX"
        np.testing.assert_array_equal(tf.asarray(), volumes.max(axis=1))  # numpy reference


def test_cli_errors_are_one_line_exit_2(job_files, capsys):
    bad = job_files.write_job(solver={"iterationz": 3})
    assert main(["run", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "unknown key 'solver.iterationz'" in err
    assert main(["status", str(job_files.folder)]) == 2
    assert "not a volrecon output store" in capsys.readouterr().err
    run_job(load_job(job_files.write_job()))
    capsys.readouterr()
    store = str(job_files.folder / "out.zarr")
    assert main(["export", store, "--tiff", str(job_files.folder / "x.tif"),
                 "--frames", "20:30"]) == 2
    assert "selects no frame" in capsys.readouterr().err
    assert main(["run", str(job_files.write_job(solver={"iterations": 3}))]) == 2
    assert "--restart" in capsys.readouterr().err
    assert main(["run", str(job_files.write_job(solver={"iterations": 3})), "--restart",
                 "--no-progress"]) == 0


def test_projection_export_without_stored_projections(job_files):
    run_job(load_job(job_files.write_job()))
    store = job_files.folder / "out.zarr"
    out = export_tiff(store, job_files.folder / "p.tif", projection="max", frames="-2:")
    np.testing.assert_array_equal(tifffile.imread(out), read_volumes(store)[-2:].max(axis=1))
    with pytest.raises(ConfigError, match="--frames"):
        export_tiff(store, job_files.folder / "q.tif", frames="1-3")


def test_progress_bar_shows_count_and_rate(job_files):
    stream = io.StringIO()
    with progress_bar(file=stream, disable=False) as update:
        run_job(load_job(job_files.write_job()), progress=update)
    text = stream.getvalue()
    assert f"{N_FRAMES}/{N_FRAMES}" in text and "frames/s" in text and "0 failed" in text
    # The bar is drawn from the run's start (0 of 12 before the first task ends).
    assert f"0/{N_FRAMES}" in text


def test_progress_in_a_log_is_plain_lines_with_wall_time_rate(job_files):
    # Not a terminal (a StringIO, like a batch system's log file): plain lines, the first at
    # the start, the last at the end; the rate is frames over this run's wall time, the same
    # arithmetic as the run's summary line.
    stream = io.StringIO()
    with progress_bar(file=stream, interval_s=3600.0) as update:
        result = run_job(load_job(job_files.write_job()), progress=update)
    lines = stream.getvalue().splitlines()
    assert lines[0] == f"progress: 0/{N_FRAMES} frames (0 failed), starting"
    assert lines[-1].startswith(f"progress: {N_FRAMES}/{N_FRAMES} frames (0 failed), ")
    rate = float(lines[-1].split(", ")[1].split()[0])
    assert rate == pytest.approx(N_FRAMES / result.seconds, rel=0.5)
    assert "\r" not in stream.getvalue()


def test_status_into_a_closed_pipe_is_quiet(job_files):
    # `volrecon status STORE | head -1`: the reader may quit before the writer is done.
    import subprocess
    import sys

    run_job(load_job(job_files.write_job()))
    child = subprocess.Popen([sys.executable, "-m", "volrecon.cli", "status",
                              str(job_files.folder / "out.zarr")],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert child.stdout is not None and child.stderr is not None
    child.stdout.close()  # the pipe's reader is gone before the first line is written
    with child.stderr:
        err = child.stderr.read().decode()
    assert child.wait(timeout=120) == 0 and "Traceback" not in err, err
