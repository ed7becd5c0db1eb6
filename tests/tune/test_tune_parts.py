"""The pieces of a tuning run: frames, grid, criteria, iteration check, registration, dask."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from scipy.ndimage import shift as nd_shift
from skimage.registration import phase_cross_correlation

from volrecon import PSFModel
from volrecon.errors import ConfigError, DataError, ShapeError
from volrecon.pipeline.config import ComputeSettings
from volrecon.solvers import SolverSettings
from volrecon.tune.criteria import blurred_relative_change, choose_cell, stabilities
from volrecon.tune.execute import run_calls
from volrecon.tune.iterations import candidate_counts, chain_error
from volrecon.tune.noise import FrameNoise, PhotonTransfer
from volrecon.tune.reference import estimate_volume_shift, registered_correlation
from volrecon.tune.sites import Site, choose_site_frames
from volrecon.tune.solve import solve_chain, solve_site
from volrecon.tune.sweep import FINE_STEP, fine_grid, weight_unit


# ------------------------------------------------------------------------------------ sites
def test_sites_spread_through_the_job_and_keep_neighbours():
    assert choose_site_frames(0, 40, 40, count=3) == (10, 20, 29)
    assert choose_site_frames(0, 3, 3, count=3) == (1,)
    assert choose_site_frames(0, 5, 5, count=9) == (1, 2, 3)
    frames = choose_site_frames(100, 200, 1000, count=4)
    assert len(frames) == 4 and all(100 <= t < 199 for t in frames)
    assert choose_site_frames(0, 10, 10, frames=[5, 2, 5]) == (2, 5)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"frames": [0]}, "needs a neighbour on each side, so choose frames 1 to 8"),
    ({"frames": [9]}, "frames 1 to 8"),
    ({"frames": []}, "--frames is empty"),
    ({"count": 0}, "at least 1"),
])
def test_site_errors(kwargs, match):
    with pytest.raises(ConfigError, match=match):
        choose_site_frames(0, 10, 10, **kwargs)


def test_too_short_video():
    with pytest.raises(ConfigError, match=r"has 2 frame.*at least 3"):
        choose_site_frames(0, 2, 2)


# ------------------------------------------------------------------------------------- grid
def test_fine_grid_is_the_half_decade_neighbourhood():
    coarse = [(t, w) for t in (0.0, 0.1, 1.0) for w in (0.0, 1.0, 10.0)]
    fine = fine_grid(0.1, 1.0, coarse)
    assert len(fine) == 8  # 3 x 3 around the best, minus itself
    assert (pytest.approx(0.1 / FINE_STEP), pytest.approx(1.0 * FINE_STEP)) in fine
    # At zero the neighbour is the smallest coarse value over sqrt(10); at the edge the grid
    # extends outwards.
    assert set(fine_grid(0.0, 0.0, coarse)) == {
        (0.0, 1.0 / FINE_STEP), (0.1 / FINE_STEP, 0.0), (0.1 / FINE_STEP, 1.0 / FINE_STEP)}
    assert max(t for t, _ in fine_grid(1.0, 10.0, coarse)) == pytest.approx(FINE_STEP)
    assert max(w for _, w in fine_grid(1.0, 10.0, coarse)) == pytest.approx(10 * FINE_STEP)


def _delta_model(nz: int = 3, size: int = 16) -> PSFModel:
    psf = np.zeros((nz, size, size), np.float32)
    psf[:, size // 2, size // 2] = 1.0
    return PSFModel.from_stack(psf, depth_step_um=1.0, pixel_size_um=1.0)


def _white_noise(variance: float, shape: tuple[int, int]) -> FrameNoise:
    zeros = np.zeros(shape, np.float32)
    empty = np.zeros(0)
    return FrameNoise(gain_adu_per_electron=1.0, gain_stderr=math.nan,
                      intercept_yx=np.full(shape, variance, np.float32),
                      slope_yx=np.zeros(shape, np.float32), dark_mean_variance_yx=zeros,
                      dark_frames=0,
                      transfer=PhotonTransfer(empty, empty, empty, empty.astype(int)))


def test_weight_unit_is_the_back_projected_noise(rng: np.random.Generator):
    # A PSF of 4 equal taps: h has norm 1/2, so Aᵀn of white noise of variance 9 has
    # standard deviation 3 * 1/2 per voxel (Var[Σ h_i n_i] = σ² Σ h_i², textbook).
    psf = np.zeros((2, 16, 16), np.float32)
    psf[:, 8, 8] = psf[:, 8, 9] = psf[:, 9, 8] = psf[:, 9, 9] = 0.25
    model = PSFModel.from_stack(psf, depth_step_um=1.0, pixel_size_um=1.0)
    site = Site(frame=1, frames_3yx=np.zeros((3, 16, 16), np.float32))
    assert weight_unit(model, _white_noise(9.0, (16, 16)), [site]) == pytest.approx(1.5)
    # Empirical check of the same number.
    noise = rng.normal(0.0, 3.0, (400, 16, 16)).astype(np.float32)
    back = model.adjoint(noise)[:, :, 4:12, 4:12]
    assert float(back.std()) == pytest.approx(1.5, rel=0.03)


# --------------------------------------------------------------------------------- criteria
def test_choice_refuses_cells_that_do_not_explain_the_data():
    rho = [0.95, 1.00, 1.20, 1.04]
    error = [0.30, 0.20, 0.10, 0.25]
    strength = [0.0, 1.0, 3.0, 2.0]
    choice = choose_cell(rho, error, strength)
    # Cell 2 predicts best but leaves 20 % more residual than the noise: refused.
    assert choice.index == 1 and choice.criterion == "prediction"
    assert choice.discrepancy_limit == pytest.approx(1.05)
    assert choice.morozov_index == 1  # most regularised with rho <= 1
    with_reference = choose_cell(rho, error, strength, reference=[0.1, 0.2, 0.9, 0.3])
    assert with_reference.index == 2 and with_reference.criterion == "reference"
    assert with_reference.prediction_index == 1


def test_choice_allows_for_model_error():
    # No cell gets below 1.3 (a model error no setting fits): the limit moves with it.
    choice = choose_cell([1.30, 1.33, 1.40], [0.5, 0.4, 0.1], [0.0, 1.0, 2.0])
    assert choice.index == 1 and choice.discrepancy_limit == pytest.approx(1.35)


def test_choice_needs_one_finite_cell():
    with pytest.raises(DataError, match="every reconstruction of the sweep failed"):
        choose_cell([math.nan], [math.nan], [0.0])


def test_relative_change_and_stability(rng: np.random.Generator):
    base = gaussian_filter(rng.random((4, 12, 12)), 1.0)
    # Blurring is linear, so a volume scaled by (1 + e) differs by exactly e.
    assert blurred_relative_change(1.1 * base, base) == pytest.approx(0.1)
    volumes = [np.stack([base * f]) for f in (1.0, 1.1, 1.3, 1.0)]
    settings = [(0.0, 0.0), (0.1, 0.0), (1.0, 0.0), (0.0, 1.0)]
    values = stabilities(settings, volumes)
    # Cell (0.1, 0): neighbours 1.0 (change 1/1.1 - 1) and 1.3 (change 0.2/1.1).
    assert values[1] == pytest.approx(np.mean([0.1 / 1.1, 0.2 / 1.1]))
    assert values[3] == pytest.approx(0.0)
    assert math.isnan(stabilities([(0.0, 0.0)], [volumes[0]])[0])


# ------------------------------------------------------------------------------- iterations
def test_candidate_counts():
    assert candidate_counts(40) == (10, 20, 40)
    assert candidate_counts(50) == (10, 20, 40, 50)
    assert candidate_counts(5) == (5,)
    with pytest.raises(ConfigError, match="at least 1"):
        candidate_counts(0)


def test_chain_error_weighs_cold_and_warm_frames_as_the_job(rng: np.random.Generator):
    reference = gaussian_filter(rng.random((3, 4, 10, 10)), 1.0)
    chain = reference * np.array([1.2, 1.05, 1.05])[:, None, None, None]
    total, cold, warm = chain_error([chain], [reference], chain_frames=8)
    assert cold == pytest.approx(0.2) and warm == pytest.approx(0.05)
    assert total == pytest.approx(0.2 / 8 + 0.05 * 7 / 8)
    assert chain_error([chain], [reference], chain_frames=1)[0] == pytest.approx(0.2)


# -------------------------------------------------------------------------------- reference
@pytest.mark.parametrize("shift", [(1.3, -2.6, 4.2), (0.0, 0.4, -0.3), (-2.0, 5.0, 1.5)])
def test_registration_matches_scikit_image(rng: np.random.Generator, shift):
    volume = np.zeros((12, 40, 40))
    for _ in range(8):
        volume[rng.integers(3, 9), rng.integers(8, 32), rng.integers(8, 32)] = 1.0
    volume = gaussian_filter(volume, 1.2)
    moved = nd_shift(volume, shift, order=3, mode="constant")
    ours = np.array(estimate_volume_shift(volume, moved))
    # Reference: skimage.registration.phase_cross_correlation (upsampled DFT,
    # Guizar-Sicairos 2008) at 1/20 voxel, and the known shift. The parabola through the
    # peak is good to ~0.1 voxel on blobs of this size.
    theirs, _, _ = phase_cross_correlation(volume, moved, upsample_factor=20,
                                           normalization=None)
    np.testing.assert_allclose(ours, -np.array(shift), atol=0.12)
    np.testing.assert_allclose(ours, theirs, atol=0.15)
    # Aligned, the volumes agree but for the blobs shifted across the border (lost) and the
    # linear interpolation of the realignment.
    assert registered_correlation(moved, volume, blur_voxels=0.5).correlation > 0.9


def test_registration_errors(rng: np.random.Generator):
    with pytest.raises(ShapeError, match="of one shape"):
        estimate_volume_shift(rng.random((2, 4, 4)), rng.random((2, 4, 5)))
    with pytest.raises(DataError, match="constant"):
        registered_correlation(rng.random((2, 4, 4)), np.ones((2, 4, 4)))


# ------------------------------------------------------------------------------------- dask
@pytest.mark.parametrize("scheduler", ["synchronous", "threads", "processes"])
def test_sweep_calls_give_the_same_results_on_every_scheduler(rng: np.random.Generator,
                                                              scheduler):
    model = _delta_model()
    frames = rng.random((3, 16, 16)).astype(np.float32)
    call = SolverSettings(method="admm", tol=0.0)
    calls = [(frames, tv, 0.01, 10, call) for tv in (0.0, 0.05)]
    compute = ComputeSettings(scheduler=scheduler, workers=2)
    got = run_calls(solve_site, model, calls, compute)
    expected = [solve_site(model, *c) for c in calls]
    for a, b in zip(got, expected, strict=True):
        np.testing.assert_array_equal(a.volume, b.volume)
        assert a.residual_energy == b.residual_energy
    # Held-out energy: |Av - (b0 + b2)/2|^2, computed here with numpy.
    predicted = model.forward(expected[0].volume).astype(np.float64)
    target = 0.5 * (frames[0].astype(np.float64) + frames[2])
    assert expected[0].holdout_energy == pytest.approx(((predicted - target) ** 2).sum())


def test_chain_warm_starts_from_the_previous_frame(rng: np.random.Generator):
    from volrecon import reconstruct

    model = _delta_model()
    frames = rng.random((2, 16, 16)).astype(np.float32)
    call = SolverSettings(method="admm", tol=0.0)
    chain = solve_chain(model, frames, 0.0, 0.01, 5, call)
    first, info = reconstruct(frames[0], model, iterations=5, l1=0.01, tol=0.0,
                              return_info=True)
    second = reconstruct(frames[1], model, iterations=5, l1=0.01, tol=0.0, init=info.state)
    np.testing.assert_array_equal(chain[0], first)
    np.testing.assert_array_equal(chain[1], second)


# -------------------------------------------------------------------------------- grid edge
def test_choice_on_the_upper_edge_warns_once_per_weight():
    from volrecon.errors import VolreconWarning
    from volrecon.tune.sweep import SweepCell
    from volrecon.tune.tune import _upper_edges

    def cell(tv, l1):
        return SweepCell(tv_units=tv, l1_units=l1, tv=tv, l1=l1, stage=0, discrepancy=(1.0,),
                         prediction_error=(0.1,), reference=None, stability=math.nan,
                         volumes=np.zeros((1, 1, 2, 2), np.float32), seconds=0.0)

    cells = [cell(t, w) for t in (0.0, 0.1, 1.0) for w in (0.0, 1.0, 10.0)]
    inside = next(c for c in cells if (c.tv_units, c.l1_units) == (0.1, 1.0))
    assert _upper_edges(cells, inside, 2.0, widened=False) == ""
    corner = next(c for c in cells if (c.tv_units, c.l1_units) == (1.0, 10.0))
    with pytest.warns(VolreconWarning) as record:
        assert _upper_edges(cells, corner, 2.0, widened=False) == "tv and l1"
    messages = [str(w.message) for w in record]
    assert len(messages) == 2 and all("\n" not in m for m in messages)
    assert "best tv = 2 (1 u) lies on the upper edge" in messages[0]
    assert f"widening it once more to {FINE_STEP:.3g} u" in messages[0]
    assert "best l1 = 20 (10 u)" in messages[1]
    with pytest.warns(VolreconWarning, match="still on the upper edge of the sweep after"):
        _upper_edges(cells, corner, 2.0, widened=True)
    # Zero is a true bound: a choice of tv = 0 never warns about the lower edge.
    zero = next(c for c in cells if (c.tv_units, c.l1_units) == (0.0, 1.0))
    assert _upper_edges(cells, zero, 2.0, widened=False) == ""
