"""The transforms a warm solve spends outside its loop, counted (not timed).

The budget of a frame (issue "throughput"): a warm solve of k iterations costs its k
iterations plus at most two FFT-bound iterations of fixed work, where one bound iteration is
Z forward plus Z inverse plane transforms (one A and one Aᵀ). Counting the planes the
backend transforms makes that a property of the code, not of a noisy machine.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pytest

import volrecon
from volrecon.backend import Backend
from volrecon.solvers import SolverSettings, solve_frame

NZ = 6


@dataclasses.dataclass(frozen=True)
class CountingBackend(Backend):
    """The real numpy backend, counting 2-D plane transforms (each a full FFT of a plane)."""

    planes: dict[str, int] = dataclasses.field(default_factory=lambda: {"n": 0})

    def _count(self, a: Any) -> None:
        self.planes["n"] += int(np.prod(a.shape[:-2], dtype=np.int64))

    def rfft2(self, a: Any, shape_yx: tuple[int, int]) -> Any:
        self._count(a)
        return super().rfft2(a, shape_yx)

    def irfft2(self, a: Any, shape_yx: tuple[int, int], **kw: Any) -> Any:
        self._count(a)
        return super().irfft2(a, shape_yx, **kw)

    def irfft2_window(self, a: Any, shape_yx: tuple[int, int], window_yx: tuple[int, int],
                      **kw: Any) -> Any:
        self._count(a)
        return super().irfft2_window(a, shape_yx, window_yx, **kw)


@pytest.fixture
def counted():
    rng = np.random.default_rng(3)
    psf = rng.random((NZ, 24, 24)).astype(np.float32) ** 8
    model = volrecon.PSFModel.from_stack(psf / psf.sum(), depth_step_um=2.0, pixel_size_um=1.0)
    base = model.backend
    backend = CountingBackend(base.device, base.xp, base.fft, base.threads)
    model = model.with_backend(backend)
    model.operator_norm_squared()
    truth = (rng.random(model.shape_in) > 0.99).astype(np.float32)
    frame = np.asarray(model.forward(truth)) + 0.01
    return model, backend, frame


@pytest.mark.parametrize("method, tv", [("admm", 0.0), ("admm", 1e-3), ("fista", 0.0),
                                        ("rl", 0.0)])
def test_warm_solve_fixed_cost_is_within_two_bound_iterations(counted, method, tv):
    model, backend, frame = counted
    start = solve_frame(frame, model, SolverSettings(method=method, iterations=20, tv=tv,
                                                     tol=0.0))
    spent = {}
    for k in (2, 7):
        backend.planes["n"] = 0
        result = solve_frame(frame, model, SolverSettings(method=method, iterations=k, tv=tv,
                                                          tol=0.0), init=start.info.state)
        assert result.failure is None and result.info.iterations == k
        spent[k] = backend.planes["n"]
    per_iteration = (spent[7] - spent[2]) / 5
    fixed = spent[2] - 2 * per_iteration
    bound = 2 * NZ  # planes of one FFT-bound iteration: Z forward + Z inverse
    # Per iteration: one A and one Aᵀ (plus ADMM's two single-plane transforms and, at its
    # checks every 5 iterations, two more).
    assert per_iteration <= bound + 3
    assert fixed <= 2 * bound, f"{method}: {fixed} planes outside the loop"
    # Counted today: the only fixed transform of every method is the A v of the result's
    # objective and residual (Z + 1 planes; a warm ADMM start reuses M v from the state; RL's
    # sensitivity Aᵀ1 is computed once per model, here by the first solve).
    assert fixed <= NZ + 3, f"{method}: {fixed} planes outside the loop"


def test_rl_sensitivity_is_computed_once_per_model(counted):
    model, backend, frame = counted
    settings = SolverSettings(method="rl", iterations=3, tol=0.0)
    spent = []
    for _ in range(2):
        backend.planes["n"] = 0
        assert solve_frame(frame, model, settings).failure is None
        spent.append(backend.planes["n"])
    ones = np.ones(model.shape_out, np.float32)
    backend.planes["n"] = 0
    reference = model.adjoint(ones)  # Aᵀ1, by definition
    one_adjoint = backend.planes["n"]
    assert one_adjoint > 0 and spent[0] - spent[1] == one_adjoint
    np.testing.assert_array_equal(model.sensitivity(), reference)


def test_admm_model_constants_are_computed_once_per_model(counted, monkeypatch):
    """A warm ADMM + TV solve reuses the model's spectra, Σ|Ĥ|² and the volume-solve factors
    of its starting penalties from the solve before, and gives the same bits as a model
    that has nothing kept."""
    from volrecon.solvers import admm_kernels

    model, _, frame = counted
    fresh = model.with_backend(model.backend)  # the same operator, nothing kept
    settings = SolverSettings(method="admm", iterations=2, tv=1e-3, tol=0.0)
    start = solve_frame(frame, model, SolverSettings(method="admm", iterations=20, tv=1e-3,
                                                     tol=0.0))
    calls = {"factors": 0, "spectra": 0}
    factors, spectra = admm_kernels.volume_factors, model.transfer_functions

    def counted_factors(*args: Any) -> None:
        calls["factors"] += 1
        factors(*args)

    def counted_spectra() -> Any:
        calls["spectra"] += 1
        return spectra()

    monkeypatch.setattr(admm_kernels, "volume_factors", counted_factors)
    monkeypatch.setattr(model, "transfer_functions", counted_spectra)
    first = solve_frame(frame, model, settings, init=start.info.state)
    # The 20-iteration solve left the spectra and the factors of the penalties it ended
    # with, which a warm start begins from (2 iterations end before any rebalancing).
    assert calls == {"factors": 0, "spectra": 0}
    assert first.info.iterations == 2
    second = solve_frame(frame, model, settings, init=start.info.state)
    assert calls == {"factors": 0, "spectra": 0}
    np.testing.assert_array_equal(first.volume, second.volume)
    monkeypatch.undo()
    reference = solve_frame(frame, fresh, settings, init=start.info.state)
    np.testing.assert_array_equal(first.volume, reference.volume)
