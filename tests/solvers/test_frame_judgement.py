"""How solve_frame judges a result: the residual rule refuses a volume that explains nothing."""

from __future__ import annotations

import numpy as np
import pytest

import volrecon
from volrecon.errors import ConfigError
from volrecon.solvers import SolverSettings, solve_frame


def _model():
    psf = np.zeros((2, 16, 16), np.float32)
    psf[:, 8, 8] = 1.0
    psf[1, 8, 9] = 0.5
    return volrecon.PSFModel.from_stack(psf, depth_step_um=2.0, pixel_size_um=1.0)


def test_default_refuses_the_all_zero_volume():
    assert SolverSettings().max_residual == 0.95
    # A frame below zero everywhere (e.g. a frame darker than its dark): the nonnegative
    # volume closest to it is all zero, whose relative residual |0 - b| / |b| is exactly 1.
    frame = -np.ones((16, 16), np.float32)
    result = solve_frame(frame, _model(), SolverSettings(iterations=20))
    assert result.volume is None and result.info is not None
    assert result.info.residual == pytest.approx(1.0, abs=1e-6)
    assert result.failure.startswith("the volume explains (almost) none of the frame: "
                                     "relative residual 1 reaches max_residual = 0.95")
    # The old bound accepted it.
    assert solve_frame(frame, _model(), SolverSettings(iterations=20, max_residual=2.0)
                       ).failure is None


def test_a_frame_the_model_explains_passes(rng):
    truth = rng.random((2, 16, 16)).astype(np.float32)
    frame = _model().forward(truth)
    result = solve_frame(frame, _model(), SolverSettings(iterations=50))
    assert result.failure is None and result.info.residual < 0.1


def test_bound_must_be_positive():
    with pytest.raises(ConfigError, match="max_residual must be a finite number > 0"):
        SolverSettings(max_residual=0)
