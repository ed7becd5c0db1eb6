"""``volrecon run JOB.toml --estimate``: a prediction from a few frames, nothing written."""

from __future__ import annotations

import re

from jobdata import N_FRAMES, SHAPE_ZYX

from volrecon.cli import main
from volrecon.pipeline import load_job, run_job
from volrecon.pipeline.estimate import estimate_job


def test_estimate_writes_nothing_and_predicts_size(job_files, capsys):
    job_path = job_files.write_job()
    before = sorted(p.name for p in job_files.folder.iterdir())
    assert main(["run", str(job_path), "--estimate"]) == 0
    text = capsys.readouterr().out
    assert re.search(rf"whole job: {N_FRAMES} frames in about \d+ (s|min)", text)
    assert sorted(p.name for p in job_files.folder.iterdir()) == before  # nothing written
    estimate = estimate_job(load_job(job_path))
    assert estimate.sampled == 3 and estimate.parallel_frames == 2
    # Textbook arithmetic: the duration is frames × seconds per frame / frames at once.
    assert abs(estimate.seconds - N_FRAMES * estimate.seconds_per_frame / 2) < 1e-9
    run_job(load_job(job_path))
    chunks = sum(p.stat().st_size for p in (job_files.folder / "out.zarr" / "0" / "c").rglob("*")
                 if p.is_file())
    # Reference: the chunk files the real run wrote; the sample's compression predicts them
    # within a factor of 2 (frames differ in content, so not exactly).
    assert 0.5 < estimate.store_bytes / chunks < 2.0
    assert estimate.compression_ratio > 1.0
    assert SHAPE_ZYX[0] * SHAPE_ZYX[1] * SHAPE_ZYX[2] * 4 * N_FRAMES / chunks > 1.0
