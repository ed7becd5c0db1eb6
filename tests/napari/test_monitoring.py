"""What the job monitor reads from a half-finished store (no Qt needed)."""

from __future__ import annotations

import numpy as np
import pytest
from napari_stores import FAILED_FRAME, FINISHED, N_FRAMES

from volrecon.errors import InputFileError
from volrecon.napari.monitoring import format_duration, plot_series, read_job_snapshot
from volrecon.pipeline import StoreLock


def test_snapshot_of_a_stopped_half_finished_store(output_store):
    snapshot = read_job_snapshot(output_store.path)
    s = snapshot.status
    # Reference: what conftest wrote (two tasks of 3 frames, one frame failed).
    assert (s.total, s.done, s.failed) == (N_FRAMES, FINISHED, 1)
    assert s.state == "stopped" and s.failures == {FAILED_FRAME: "solver diverged"}
    np.testing.assert_array_equal(snapshot.diagnostics["status"], output_store.status)
    np.testing.assert_array_equal(snapshot.diagnostics["iterations"], output_store.iterations)
    np.testing.assert_array_equal(snapshot.diagnostics["residual"], output_store.residual)
    assert snapshot.summary()[:2] == [f"{FINISHED} of {N_FRAMES} frames finished, 1 failed",
                                      "state: stopped"]
    # conftest marked every frame converged; the failed one (of the finished) is not counted.
    assert snapshot.summary()[2] == f"converged: {FINISHED - 1}, at the iteration cap: 0"
    assert any("frame 4: solver diverged" in line for line in snapshot.details())


def test_snapshot_while_a_run_holds_the_lock_gives_an_eta(output_store):
    with StoreLock(output_store.path):
        snapshot = read_job_snapshot(output_store.path)
    s = snapshot.status
    assert s.running and s.state == "running"
    # Reference: arithmetic. The run record says it started 30 s before with 0 frames done;
    # 6 frames since gives 0.2 frames/s and 4 pending frames 20 s to go. The test's own run
    # time adds a little to the 30 s, hence the loose tolerance.
    assert s.frames_per_second == pytest.approx(FINISHED / 30.0, rel=0.1)
    assert s.seconds_left == pytest.approx((N_FRAMES - FINISHED) / (FINISHED / 30.0), rel=0.1)
    assert snapshot.summary()[-1].startswith("time left: 2")


def test_monitor_refuses_a_folder_that_is_not_a_store(tmp_path):
    with pytest.raises(InputFileError, match="not a volrecon output store"):
        read_job_snapshot(tmp_path)


def test_plot_series_shows_done_frames_and_marks_failed_ones(output_store):
    diagnostics = read_job_snapshot(output_store.path).diagnostics
    frames, values, failed, _ = plot_series(diagnostics, "iterations")
    done = [t for t in range(FINISHED) if t != FAILED_FRAME]
    np.testing.assert_array_equal(frames, done)
    np.testing.assert_array_equal(values, output_store.iterations[done])
    np.testing.assert_array_equal(failed, [FAILED_FRAME])


def test_plot_series_bins_long_jobs_by_mean_of_done_frames(rng):
    n = 10_000
    status = (rng.random(n) < 0.7).astype(np.uint8)
    residual = rng.random(n)
    frames, values, _, _ = plot_series({"status": status, "residual": residual}, "residual",
                                       max_points=100)
    # Reference: numpy mean over the done frames of each block of 100 frames.
    blocks = residual.reshape(100, 100)
    done = status.reshape(100, 100) == 1
    expected = np.array([b[d].mean() for b, d in zip(blocks, done, strict=True)])
    np.testing.assert_allclose(values, expected, rtol=1e-12)
    np.testing.assert_allclose(frames, np.arange(100) * 100 + 49.5)
    with pytest.raises(ValueError, match="max_points"):
        plot_series({"status": status, "residual": residual}, "residual", max_points=0)


@pytest.mark.parametrize(("seconds", "text"), [(12.4, "12 s"), (200, "3 min 20 s"),
                                               (7500, "2 h 05 min"), (float("inf"), "unknown")])
def test_format_duration(seconds, text):
    assert format_duration(seconds) == text


def test_view_without_a_display_is_one_line_not_a_qt_abort(output_store, monkeypatch, capsys):
    from volrecon.cli import main

    for name in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM"):
        monkeypatch.delenv(name, raising=False)
    assert main(["view", str(output_store.path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "needs a display" in err[0] and "xvfb-run" in err[0]
