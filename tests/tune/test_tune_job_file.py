"""The tuned job file keeps its comments and key order; the temporal weight joins it."""

from __future__ import annotations

import dataclasses
import json
import tomllib
from pathlib import Path

from tunebench import Bench

from volrecon.pipeline import load_job
from volrecon.tune import TuneResult, write_report, write_tuned_job

COMMENTED_JOB = """\
# Our overnight recording.  Keep this note!
[model]
path = "model"  # calibrated on Tuesday

[video]
path = "raw/video.tif"
dark = "raw/dark.tif"

[solver]
# weights below get replaced by tuning
iterations = 60
tv = 0.5    # a guess
warm_start = true

[output]
path = "volumes.zarr"
time_interval_s = 0.05

[compute]
scheduler = "threads"
workers = 2
"""


def test_comments_and_key_order_survive(dim_bench: Bench, dim_tuned: TuneResult):
    path = dim_bench.job_path.with_name("job-commented.toml")
    path.write_text(COMMENTED_JOB, encoding="utf-8")
    result = dataclasses.replace(dim_tuned, job=load_job(path))
    write_tuned_job(result, path)
    write_tuned_job(result, path)  # a second run replaces the header, never stacks it
    text = path.read_text(encoding="utf-8")
    assert text.count("# Solver settings chosen by") == 1
    for comment in ("# Our overnight recording.  Keep this note!", "# calibrated on Tuesday",
                    "# weights below get replaced by tuning", "# a guess"):
        assert comment in text
    body = text[text.index("# Our overnight"):]
    # Reference: the standard library's TOML reader.
    document = tomllib.loads(body)
    assert list(document) == ["model", "video", "solver", "output", "compute"]
    assert list(document["solver"])[:3] == ["iterations", "tv", "warm_start"]
    assert document["solver"]["tv"] == dim_tuned.tv
    assert document["solver"]["l1"] == dim_tuned.l1
    assert document["solver"]["iterations"] == dim_tuned.iteration_count
    assert "temporal_weight" not in document["solver"]  # no window, no sweep


def test_temporal_weight_is_swept_written_and_reported(temporal_tuned: TuneResult,
                                                       tmp_path: Path):
    sweep = temporal_tuned.temporal
    assert sweep is not None and sweep.run_length == 5
    weights = [c.weight_units for c in sweep.cells]
    assert weights == sorted(weights) and weights[0] == 0.0 and len(weights) >= 5
    assert all(len(c.prediction_errors) == 2 * len(sweep.run_frames) for c in sweep.cells)
    out = tmp_path / "tuned.toml"
    write_tuned_job(temporal_tuned, out)
    job = load_job(out)
    assert job.solver.temporal_window == 4
    assert job.solver.temporal_weight == temporal_tuned.temporal_weight == sweep.weight
    files = {f.name for f in write_report(temporal_tuned, tmp_path / "report")}
    assert "temporal.png" in files
    summary = (tmp_path / "report" / "summary.txt").read_text(encoding="utf-8")
    assert "temporal_weight:" in summary and "<- chosen" in summary
    record = json.loads((tmp_path / "report" / "tune.json").read_text(encoding="utf-8"))
    assert record["temporal"]["chosen"] == sweep.weight
    assert len(record["temporal"]["cells"]) == len(sweep.cells)
