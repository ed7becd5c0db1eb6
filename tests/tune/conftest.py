"""Fixtures of the tuning tests: the photon-starved bench (see tunebench.py), tuned once.

There is no uniform background light on this bench: a background the volume has to explain
as a haze biases the held-out criterion towards weaker l1 (see DEVELOPERS.md). Building and
tuning it takes tens of seconds, so both are shared by the session.
"""

from __future__ import annotations

import pytest
from tunebench import JOB_TEXT, QUICK, Bench, make_bench

from volrecon.tune import TuneResult, tune_job


@pytest.fixture(scope="session")
def dim_bench(tmp_path_factory: pytest.TempPathFactory) -> Bench:
    """The photon-starved bench (fixed seed: the session fixture cannot take `rng`)."""
    return make_bench(tmp_path_factory.mktemp("tune-dim"), seed=2, bead_photons=1.5e4,
                      background_photons=0.0)


@pytest.fixture(scope="session")
def dim_tuned(dim_bench: Bench) -> TuneResult:
    """`tune_job` on the photon-starved bench, without ground truth."""
    return tune_job(dim_bench.job_path, **QUICK)


@pytest.fixture(scope="session")
def temporal_tuned(dim_bench: Bench) -> TuneResult:
    """`tune_job` on the photon-starved bench with windows of 4 frames."""
    path = dim_bench.job_path.with_name("job-temporal.toml")
    path.write_text(JOB_TEXT.replace("tv = 0.5\n", "tv = 0.5\ntemporal_window = 4\n"),
                    encoding="utf-8")
    return tune_job(path, **QUICK)
