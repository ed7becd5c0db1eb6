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
    assert estimate.sampled == 5 and estimate.parallel_frames == 2
    # Counted by hand from the job's layout (12 frames, chains of 3 after a lead-in of 1):
    # chain [0, 3) solves 3 frames, [3, 6), [6, 9) and [9, 12) solve 4 each: 4 cold starts and
    # 11 warm frames, shared by 2 workers.
    by_hand = (4 * estimate.cold_seconds + 11 * estimate.warm_seconds) / 2
    assert abs(estimate.seconds - by_hand) < 1e-9 * by_hand
    assert re.search(r"one hour of 30 fps video \(108000 frames\) .* about \d+", text)
    run_job(load_job(job_path))
    chunks = sum(p.stat().st_size for p in (job_files.folder / "out.zarr" / "0" / "c").rglob("*")
                 if p.is_file())
    # Reference: the chunk files the real run wrote; the sample's compression predicts them
    # within a factor of 2 (frames differ in content, so not exactly).
    assert 0.5 < estimate.store_bytes / chunks < 2.0
    assert estimate.compression_ratio > 1.0
    assert SHAPE_ZYX[0] * SHAPE_ZYX[1] * SHAPE_ZYX[2] * 4 * N_FRAMES / chunks > 1.0
