"""Convergence made visible: frames that stop at the iteration cap are counted and advised."""

from __future__ import annotations

from jobdata import N_FRAMES

from volrecon.cli import main


def test_frames_at_the_cap_are_counted_in_the_run_summary_and_status(job_files, capsys):
    # tol = 1e-12 is not met in 8 iterations: every frame stops at the cap (a fixed count
    # with tol = 0 is a choice, not a failure to converge, and gets no advice).
    job = job_files.write_job(solver={"iterations": 8, "tol": 1e-12})
    assert main(["run", str(job), "--no-progress"]) == 0
    err = capsys.readouterr().err
    assert (f"{N_FRAMES} of {N_FRAMES} finished frames stopped at the iteration cap" in err
            and 'iterations = "auto"' in err)
    assert main(["status", str(job_files.folder / "out.zarr")]) == 0
    out = capsys.readouterr().out
    assert (f"convergence: 0 frames met the stopping rule, {N_FRAMES} stopped at the "
            "iteration cap") in out


def test_automatic_iterations_converge_and_give_no_advice(job_files, capsys):
    job = job_files.write_job(solver={"iterations": "auto", "tol": 1e-3})
    assert main(["run", str(job), "--no-progress"]) == 0
    assert "iteration cap" not in capsys.readouterr().err
    assert main(["status", str(job_files.folder / "out.zarr")]) == 0
    assert f"convergence: {N_FRAMES} frames met the stopping rule, 0 stopped" in \
        capsys.readouterr().out
