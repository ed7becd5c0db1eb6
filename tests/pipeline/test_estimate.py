"""``volrecon run JOB.toml --estimate``: a prediction from a few frames, nothing written."""

from __future__ import annotations

import re

from jobdata import N_FRAMES, SHAPE_ZYX

from volrecon.cli import main
from volrecon.pipeline import load_job, run_job
from volrecon.pipeline.estimate import estimate_job, makespan


def test_estimate_writes_nothing_and_predicts_size(job_files, capsys):
    job_path = job_files.write_job()
    before = sorted(p.name for p in job_files.folder.iterdir())
    assert main(["run", str(job_path), "--estimate"]) == 0
    text = capsys.readouterr().out
    assert re.search(rf"whole job: {N_FRAMES} frames in about \d+ (s|min)", text)
    assert sorted(p.name for p in job_files.folder.iterdir()) == before  # nothing written
    estimate = estimate_job(load_job(job_path))
    assert estimate.sampled == 5 and estimate.parallel_frames == 2
    # Counted by hand from the job's layout (12 frames, chains of 3 after a lead-in of 1, one
    # chain per task): task [0, 3) solves c + 2w, the tasks [3, 6), [6, 9) and [9, 12) solve
    # c + 3w each (c cold, w warm). Dealt in order to 2 workers: the first runs [0, 3) then
    # [6, 9), the second [3, 6) then [9, 12), and ends last at 2c + 6w, after the start-up.
    c, w = estimate.cold_seconds, estimate.warm_seconds
    by_hand = estimate.start_seconds + 2 * c + 6 * w
    assert abs(estimate.seconds - by_hand) < 1e-9 * by_hand
    assert estimate.start_seconds > 0 and "start-up" in text
    assert re.search(r"one hour of 30 fps video \(108000 frames\) .* about \d+", text)
    run_job(load_job(job_path))
    chunks = sum(p.stat().st_size for p in (job_files.folder / "out.zarr" / "0" / "c").rglob("*")
                 if p.is_file())
    # Reference: the chunk files the real run wrote; the sample's compression predicts them
    # within a factor of 2 (frames differ in content, so not exactly).
    assert 0.5 < estimate.store_bytes / chunks < 2.0
    assert estimate.compression_ratio > 1.0
    assert SHAPE_ZYX[0] * SHAPE_ZYX[1] * SHAPE_ZYX[2] * 4 * N_FRAMES / chunks > 1.0


def test_makespan_deals_tasks_in_order_to_the_first_free_worker():
    # By hand: worker A takes 4, worker B 1 then 2 (free at 1, then at 3), A is busy until 4,
    # so the last task (3) goes to B at 3 and ends at 6.
    assert makespan([4.0, 1.0, 2.0, 3.0], 2) == 6.0
    assert makespan([4.0, 1.0, 2.0, 3.0], 1) == 10.0  # one worker: the sum
    assert makespan([4.0, 1.0], 8) == 4.0  # more workers than tasks: the longest
