"""`volrecon bench` end to end on a tiny problem: every case runs and reports its figures."""

from __future__ import annotations

import json

from volrecon.bench import overhead
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
    # the warm-solve records: fixed cost and per-iteration cost from a straight-line fit
    assert [(r["method"], r["tv"]) for r in report["overhead"]] == list(overhead.CASES)
    for r in report["overhead"]:
        assert len(r["solve_in_bounds"]) == len(r["iterations"])
        assert r["per_iteration_in_bounds"] > 0


def test_bench_table(capsys):
    assert main(["bench", "--size", "2", "16", "16"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("Per iteration against the FFT lower bound")
    # the per-iteration table (title, header, one line per case), then the warm-solve table
    # (title, one line per case)
    warm = len(overhead.CASES)
    assert len(lines) == 2 + len(CASES) + 1 + warm
    assert lines[2 + len(CASES)].startswith("Warm solve of k iterations")
    assert all("fixed cost" in line for line in lines[-warm:])
