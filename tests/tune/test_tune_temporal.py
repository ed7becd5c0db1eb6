"""The temporal-weight sweep: odd frames held out, predicted by the midpoint of their neighbours."""

from __future__ import annotations

import numpy as np
import pytest

from volrecon.pipeline.config import ComputeSettings
from volrecon.simulate.scoring import blurred_correlation
from volrecon.solvers import SolverSettings, reconstruct_window
from volrecon.solvers.admm import solve_admm_window
from volrecon.tune.noise import FrameNoise, PhotonTransfer
from volrecon.tune.temporal import run_length, solve_interleaved, sweep_temporal_weight

ITERATIONS = 60
BACKGROUND = 2.0  # photons per pixel, subtracted again (a known offset)


def _video(kind: str, n_frames: int = 9, seed: int = 11):
    """Sparse beads through a simulated diffuser PSF, ~3 signal photons per pixel (Poisson)."""
    from volrecon.bench.iteration import problem

    rng = np.random.default_rng(seed)
    _, model = problem(4, 64, 64, "cpu", 1)
    scenes = [(rng.random(model.shape_in) > 0.998).astype(np.float32) for _ in range(n_frames)]
    scale = 3.0 / float(np.asarray(model.forward(scenes[0])).mean())
    truth = np.stack([(np.roll(scenes[0], t // 2, axis=2) if kind == "drift" else scenes[t])
                      * scale for t in range(n_frames)])
    frames = np.stack([rng.poisson(np.asarray(model.forward(v)) + BACKGROUND) - BACKGROUND
                       for v in truth]).astype(np.float32)
    return model, frames, truth


def _poisson_noise(shape_yx) -> FrameNoise:
    """The simulated camera: gain 1 electron per count, variance = background + signal."""
    empty = np.zeros(0)
    return FrameNoise(gain_adu_per_electron=1.0, gain_stderr=float("nan"),
                      intercept_yx=np.full(shape_yx, BACKGROUND, np.float32),
                      slope_yx=np.ones(shape_yx, np.float32),
                      dark_mean_variance_yx=np.zeros(shape_yx, np.float32), dark_frames=0,
                      transfer=PhotonTransfer(empty, empty, empty, empty))


def _sweep(model, frames):
    settings = SolverSettings(method="admm", tol=0.0, temporal_window=8)
    return sweep_temporal_weight(model, [frames], _poisson_noise(model.shape_out), tv=0.0,
                                 l1=0.0, iterations=ITERATIONS, settings=settings,
                                 compute=ComputeSettings(workers=2))


def _truth_correlation(model, frames, truth, weight):
    volumes, _ = reconstruct_window(frames, model, iterations=ITERATIONS, tol=0.0,
                                    temporal_weight=weight)
    return float(np.mean([blurred_correlation(np.asarray(v), t)
                          for v, t in zip(volumes, truth, strict=True)]))


def test_dropping_odd_frames_is_the_even_window_at_half_weight(rng: np.random.Generator):
    # Reference: the full 5-frame window solved with the odd frames' data term replaced by a
    # copy of zero weight is not expressible in the solver, so check the identity the module
    # rests on directly: min over x of ½λ(|x - a|² + |b - x|²) = ¼λ|b - a|² at x = (a + b)/2
    # (textbook completion of the square), and that solve_interleaved solves exactly the even
    # frames with weight λ/2 (solve_admm_window called here by hand).
    a, b = rng.random((2, 50))
    lam = 0.7
    x = np.linspace(-1, 2, 3001)[:, None] * (b - a) + a
    values = 0.5 * lam * (((x - a) ** 2).sum(1) + ((b - x) ** 2).sum(1))
    assert values.min() == pytest.approx(0.25 * lam * ((b - a) ** 2).sum(), rel=1e-6)
    model, frames, _ = _video("drift", n_frames=5)
    settings = SolverSettings(method="admm", tol=0.0)
    got = solve_interleaved(model, frames, 0.0, 0.0, 0.2, 30, settings)
    volumes, *_ = solve_admm_window(frames[0::2], model, iterations=30, tv=0.0, l1=0.0,
                                    tol=0.0, tv_z_weight=1.0, temporal_weight=0.1, init=None)
    np.testing.assert_allclose(got.volumes, np.asarray(volumes), rtol=1e-5, atol=1e-6)
    predicted = [np.asarray(model.forward(v), np.float64) for v in got.volumes]
    for j, energy in enumerate(got.holdout_energy):
        midpoint = 0.5 * (predicted[j] + predicted[j + 1])
        assert energy == pytest.approx(((midpoint - frames[2 * j + 1]) ** 2).sum(), rel=1e-6)


def test_run_length_spans_a_window():
    assert [run_length(w, 100) for w in (2, 3, 8, 9)] == [3, 5, 9, 11]
    assert run_length(8, 6) == 5 and run_length(8, 3) == 3


def test_tuned_weight_is_near_the_best_on_a_drifting_video():
    model, frames, truth = _video("drift")
    sweep = _sweep(model, frames)
    assert sweep.weight > 0
    grid = [0.0] + [g * sweep.unit for g in (3e-4, 1e-3, 3e-3, 1e-2, 3e-2, 1e-1)]
    scores = [_truth_correlation(model, frames, truth, w) for w in grid]
    ours = _truth_correlation(model, frames, truth, sweep.weight)
    # Reference: the known synthetic truth (blurred correlation). The brief asks for a
    # correlation within 10 % of the best weight of a grid; measured: see the report.
    assert ours >= 0.9 * max(scores), (ours, scores)
    assert ours > scores[0] + 0.05  # and the prior clearly helps here


def test_unrelated_scenes_get_no_prior():
    model, frames, _ = _video("unrelated")
    sweep = _sweep(model, frames)
    # Reference: the known synthetic truth: every frame is its own scene, so the prior can
    # only smear them together (the midpoint predicts nothing).
    assert sweep.weight == 0.0
    assert sweep.cells[sweep.best_index].weight_units <= 0.01


def test_one_standard_error_rule_and_discrepancy_limit():
    from volrecon.tune.temporal import TemporalCell, _choose

    def cell(units, rho, errors):
        return TemporalCell(weight_units=units, weight=units, stage=0, discrepancy=rho,
                            prediction_errors=tuple(errors), volumes=np.zeros(0), seconds=0.0)

    # Weight 0.01 has the lowest error; 0.001 is above it by 0.004 on every frame (paired
    # standard error 0, so not within one); 0 is far worse; 0.1 fails the discrepancy limit.
    cells = [cell(0.0, 0.97, [0.30, 0.10, 0.20]), cell(0.001, 0.98, [0.204, 0.104, 0.154]),
             cell(0.01, 0.99, [0.20, 0.10, 0.15]), cell(0.1, 1.2, [0.0, 0.0, 0.0])]
    assert _choose(cells, 0.05) == (2, 2, pytest.approx(1.05))
    # Reference: Breiman et al. (1984) §3.4.3: the simplest model within one standard
    # error of the best. Scattered differences (mean 0.004, standard error ~0.06) put
    # weight 0 within one standard error, so it wins.
    cells[0] = cell(0.0, 0.97, [0.30, 0.00, 0.162])
    assert _choose(cells, 0.05)[:2] == (0, 2)
