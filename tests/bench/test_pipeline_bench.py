"""`volrecon bench --pipeline` on a tiny case: the report's structure and finite figures.

No timing assertions: the figures are only checked to exist, be finite and positive.
"""

from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path
from typing import Any

import pytest
import tomli_w

from volrecon import bench
from volrecon.bench import pipeline
from volrecon.errors import ConfigError, DataError

N_FRAMES = 12
CHAIN_FRAMES = 4


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    """The benchmark's core on 4×32×32, 12 frames in chains of 4, synchronous, 5 iterations
    (fixed, so that the case stays fast whatever the "auto" rule is); files kept."""
    folder = tmp_path_factory.mktemp("pipeline-bench")
    report = pipeline.run(n_frames=N_FRAMES, size_zyx=(4, 32, 32), schedulers=("synchronous",),
                          workers=1, reference_frames=3, iterations=5,
                          chain_frames=CHAIN_FRAMES, tv=1e-3, directory=folder)
    return folder, report


def test_report_structure_and_finite_figures(tiny: tuple[Path, dict[str, Any]]) -> None:
    _, report = tiny
    assert report["size_zyx"] == [4, 32, 32] and report["padded_yx"] == [64, 64]
    assert report["frames"] == N_FRAMES and report["chain_frames"] == CHAIN_FRAMES
    # Tasks of 8 frames (the job's frames_per_task 8 in whole chains of 4), one at a time:
    # 12 frames leave no whole task beyond a first one, so the long run adds half the video.
    assert report["task_frames"] == 8 and report["frames_short"] == 6
    assert report["scaled"] is None and report["stores_identical"] is None
    assert report["targets"] == pipeline.TARGETS
    assert report["fft_bound_seconds"] > 0 and report["lead_in_solve_seconds_per_frame"] > 0
    (record,) = report["schedulers"]
    assert record["scheduler"] == "synchronous"
    for key in ("seconds_short", "seconds_all", "solve_seconds_per_frame", "mean_iterations"):
        assert math.isfinite(record[key]) and record[key] > 0, key
    # A difference of two wall times: finite, its sign left to the machine's load.
    for key in ("marginal_seconds_per_frame", "wall_to_solve", "wall_to_solve_with_lead_in",
                "frame_in_bounds", "hours"):
        assert math.isfinite(record[key]), key
    assert 1 <= record["mean_iterations"] <= 5
    quality = report["quality"]
    # Frames 4 and 8 start chains (frame 0 has no lead-in and is left out).
    assert quality["chain_start_frames"] == 2 and quality["reference_frames"] == 3
    for key in ("correlation", "correlation_reference_frames", "reference_correlation",
                "chain_start_correlation", "other_correlation"):
        assert -1.0 <= quality[key] <= 1.0, key
    assert math.isfinite(quality["ratio_to_reference"]) and quality["ratio_to_reference"] > 0
    json.dumps(report, allow_nan=False)  # valid JSON for --json


def test_jobs_use_the_tv_weight_asked_for(tiny: tuple[Path, dict[str, Any]]) -> None:
    folder, report = tiny
    assert report["tv"] == 1e-3
    jobs = sorted(folder.glob("*.toml"))
    assert jobs and all(tomllib.loads(j.read_text())["solver"]["tv"] == 1e-3 for j in jobs)
    assert "tv 0.001;" in pipeline.report_lines(report)[0]


def test_report_lines(tiny: tuple[Path, dict[str, Any]]) -> None:
    _, report = tiny
    lines = pipeline.report_lines(report)
    assert lines[0].startswith("Pipeline: 12 simulated frames of 4x32x32")
    assert lines[3].split()[0] == "synchronous"
    assert any(line.startswith("quality") for line in lines)
    assert not any("SCALED" in line for line in lines)


def test_scaled_figures_are_labelled(tiny: tuple[Path, dict[str, Any]]) -> None:
    _, report = tiny
    scaled = {**report, "scaled": {"size_zyx": [32, 512, 512], "bound_ratio": 20.0,
                                   "hours": {"synchronous": 100.0}}}
    assert any("SCALED (not measured)" in line for line in pipeline.report_lines(scaled))


@pytest.mark.parametrize(("n_frames", "task_frames", "workers", "span"), [
    (240, 32, 2, 128),  # 3.75 units of 64: two whole units beyond a first one
    (300, 32, 2, 192),
    (128, 32, 2, 64),
    (100, 32, 2, 50),   # less than two units: half the video
    (12, 8, 1, 6),
])
def test_marginal_span(n_frames: int, task_frames: int, workers: int, span: int) -> None:
    assert pipeline.marginal_span(n_frames, task_frames, workers) == span


def test_refuses_too_few_frames_and_other_schedulers() -> None:
    with pytest.raises(ConfigError, match="at least 2"):
        pipeline.marginal_span(1, 8, 1)
    with pytest.raises(ConfigError, match="at least 2 frames"):
        pipeline.run(n_frames=1)
    with pytest.raises(ConfigError, match="schedulers must be"):
        pipeline.run(schedulers=("local-cluster",))


def test_failed_frames_stop_the_benchmark(tiny: tuple[Path, dict[str, Any]]) -> None:
    folder, _ = tiny
    document = tomllib.loads((folder / "synchronous-all.toml").read_text())
    document["solver"]["max_residual"] = 1e-9  # no frame fits its data that well
    document["output"]["path"] = "failing.zarr"
    job = folder / "failing.toml"
    job.write_text(tomli_w.dumps(document))
    with pytest.raises(DataError, match="frames failed"):
        pipeline._timed_run(job)


def test_cli_branch(tiny: tuple[Path, dict[str, Any]], monkeypatch: pytest.MonkeyPatch,
                    capsys: pytest.CaptureFixture[str]) -> None:
    _, report = tiny
    calls: list[dict[str, Any]] = []

    def fake_run(**kwargs: Any) -> dict[str, Any]:
        calls.append(kwargs)
        return report

    monkeypatch.setattr(pipeline, "run", fake_run)
    argv = ["--pipeline", "--frames", "12", "--size", "4", "32", "32"]
    assert bench.main([*argv, "--scheduler", "threads", "--tv", "0.002", "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == {"pipeline": report}
    assert calls[-1] == {"n_frames": 12, "size_zyx": (4, 32, 32), "threads": None,
                         "schedulers": ["threads"], "tv": 0.002}
    assert bench.main(argv) == 0
    assert capsys.readouterr().out.splitlines() == pipeline.report_lines(report)
    assert calls[-1]["schedulers"] == ("threads", "processes") and calls[-1]["tv"] == 0.0
    with pytest.raises(ConfigError, match="runs on the CPU"):
        bench.main([*argv, "--device", "gpu"])
