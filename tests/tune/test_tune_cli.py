"""`volrecon tune` end to end through the CLI, and its one-line errors."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import tifffile
from tunebench import Bench

from volrecon.cli import main
from volrecon.pipeline import load_job

#: Tiny settings: the CLI run checks the plumbing, the library tests check the choices.
TINY = ["--sites", "1", "--sweep-iterations", "8", "--max-iterations", "10",
        "--reference-iterations", "20", "--quiet"]


def test_tune_with_a_reference_writes_job_and_report(dim_bench: Bench, tmp_path: Path,
                                                     capsys: pytest.CaptureFixture[str]):
    # The reference: the simulated truth of the frame tuned on (--frames 5), as a TIFF
    # z-stack with one page per plane.
    reference = tmp_path / "reference.tif"
    tifffile.imwrite(reference, np.asarray(dim_bench.truth(5), dtype=np.float32),
                     photometric="minisblack")
    out = tmp_path / "tuned.toml"
    status = main(["tune", str(dim_bench.job_path), *TINY, "--frames", "5",
                   "--reference", str(reference), "--out", str(out)])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    assert "by reference" in captured.out and f"tuned job written to {out}" in captured.out
    report = tmp_path / "tuned.report"
    data = json.loads((report / "tune.json").read_text(encoding="utf-8"))
    assert data["chosen"]["criterion"] == "reference" and data["frames"] == [5]
    scores = [c["reference_correlation"][0] for c in data["cells"]]
    best = data["cells"][int(np.argmax(scores))]
    assert data["sweep_choice"]["tv"] == best["tv"] and data["sweep_choice"]["l1"] == best["l1"]
    if data["chosen"]["confirmation"] == "kept":
        assert data["chosen"]["tv"] == pytest.approx(best["tv"], rel=5e-3)
        assert data["chosen"]["l1"] == pytest.approx(best["l1"], rel=5e-3)
    else:  # tv = l1 = 0 correlated better at the chosen iteration count
        assert (data["chosen"]["tv"], data["chosen"]["l1"]) == (0.0, 0.0)
    assert data["no_truth_choice"]["reference_correlation"] is not None
    job = load_job(out)
    assert job.solver.iterations == data["chosen"]["iterations"]
    assert (report / "sweep.png").is_file() and (report / "summary.txt").is_file()


def test_in_place_rewrites_the_job_itself(dim_bench: Bench, tmp_path: Path,
                                          capsys: pytest.CaptureFixture[str]):
    folder = tmp_path / "copy"
    shutil.copytree(dim_bench.folder, folder, ignore=shutil.ignore_patterns("*.zarr"))
    job = folder / "job.toml"
    before = load_job(job)
    assert before.solver.tv == 0.5
    status = main(["tune", str(job), *TINY, "--in-place"])
    assert status == 0, capsys.readouterr().err
    after = load_job(job)
    assert after.solver.tv != 0.5 and after.model_path == before.model_path
    assert (folder / "job.report" / "tune.json").is_file()


def _write_short_video(bench: Bench, tmp_path: Path) -> Path:
    raw = tifffile.imread(bench.scenario.files["video"])[:2]
    tifffile.imwrite(tmp_path / "short.tif", raw, photometric="minisblack")
    text = bench.job_path.read_text(encoding="utf-8").replace('"raw/video.tif"',
                                                               '"short.tif"')
    text = text.replace('"model"', f'"{(bench.folder / "model").as_posix()}"')
    text = text.replace('"raw/dark.tif"', f'"{bench.scenario.files["dark"].as_posix()}"')
    job = tmp_path / "short.toml"
    job.write_text(text, encoding="utf-8")
    return job


@pytest.mark.parametrize(("extra", "match"), [
    (["--frames", "abc"], "--frames 'abc': not a comma-separated list"),
    (["--frames", "0"], "frame 0 cannot be a tuning frame"),
    (["--sites", "0"], "n_sites must be an integer >= 1"),
    (["--tolerance", "1.5"], "tolerance must lie between 0 and 1"),
    (["--max-iterations", "50", "--reference-iterations", "40"], "must exceed max_iterations"),
    (["--gain", "-1"], "camera gain must be positive"),
    (["--out", "/nonexistent-folder/t.toml"], "does not exist"),
    (["--reference", "BAD_REFERENCE"], "has shape (2, 8, 8) but the model grid is (8, 64, 64)"),
    (["--reference", "/nonexistent/ref.tif"], "no such file; check --reference"),
    (["--reference", "NOT_A_TIFF"], "cannot read the reference z-stack"),
    (["--reference", "NAN_REFERENCE"], "holds NaN or Inf"),
])
def test_bad_input_gives_one_line(dim_bench: Bench, tmp_path: Path,
                                  capsys: pytest.CaptureFixture[str], extra, match):
    if "BAD_REFERENCE" in extra:
        path = tmp_path / "bad.tif"
        tifffile.imwrite(path, np.ones((2, 8, 8), np.float32), photometric="minisblack")
        extra = [str(path) if e == "BAD_REFERENCE" else e for e in extra]
    if "NAN_REFERENCE" in extra:
        path = tmp_path / "nan.tif"
        tifffile.imwrite(path, np.full((8, 64, 64), np.nan, np.float32),
                         photometric="minisblack")
        extra = [str(path) if e == "NAN_REFERENCE" else e for e in extra]
    if "NOT_A_TIFF" in extra:
        path = tmp_path / "text.tif"
        path.write_text("not an image", encoding="utf-8")
        extra = [str(path) if e == "NOT_A_TIFF" else e for e in extra]
    status = main(["tune", str(dim_bench.job_path), *extra])
    err = capsys.readouterr().err
    assert status == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("volrecon tune: error: "), err
    assert match in lines[0]
    assert "Traceback" not in err


def test_missing_job_and_short_video(dim_bench: Bench, tmp_path: Path,
                                     capsys: pytest.CaptureFixture[str]):
    assert main(["tune", str(tmp_path / "missing.toml")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot read the job file" in err[0]
    assert main(["tune", str(_write_short_video(dim_bench, tmp_path))]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "has 2 frame(s); tuning needs at least 3" in err[0]
