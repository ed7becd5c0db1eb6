"""`volrecon bench` end to end on a tiny problem: every case runs and reports its figures."""

from __future__ import annotations

import json

from volrecon.bench.iteration import CASES
from volrecon.cli import main


def test_bench_json_reports_every_case(capsys):
    assert main(["bench", "--size", "4", "32", "32", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    records = report["iteration"]
    assert [(r["method"], r["tv"], r["l1"]) for r in records] == list(CASES)
    for r in records:
        assert r["size_zyx"] == [4, 32, 32] and r["padded_yx"] == [64, 64]
        assert r["seconds_per_iteration"] > 0 and r["fft_bound_seconds"] > 0
        assert r["ratio_to_bound"] > 0


def test_bench_table(capsys):
    assert main(["bench", "--size", "2", "16", "16"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("Per iteration against the FFT lower bound")
    assert len(lines) == 2 + len(CASES)
