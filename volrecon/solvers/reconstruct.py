"""``reconstruct``: one camera frame → one volume, by ADMM, FISTA or Richardson–Lucy."""

from __future__ import annotations

import math
import time
from typing import TYPE_CHECKING, Any, Literal, overload

import numpy as np

from volrecon.backend import keep_freed_memory
from volrecon.errors import ConfigError, DataError, ShapeError
from volrecon.solvers.admm import solve_admm, solve_admm_window
from volrecon.solvers.fista import solve_fista
from volrecon.solvers.info import SolveInfo, SolverState
from volrecon.solvers.norms import squared_norm
from volrecon.solvers.rl import solve_rl
from volrecon.solvers.settings import METHODS
from volrecon.solvers.tv import tv_value

if TYPE_CHECKING:
    from volrecon._typing import Array
    from volrecon.models.base import PSFModel

__all__ = ["AUTO_COLD_STOP_CHANGE", "AUTO_ITERATION_CAP", "AUTO_STOP_CHANGE", "METHODS",
           "objective", "reconstruct", "reconstruct_window"]

_SOLVERS = {"admm": solve_admm, "fista": solve_fista, "rl": solve_rl}

#: ``iterations="auto"``: a frame stops after the first iteration whose relative change of the
#: volume ``c_k = ‖v_k − v_{k−1}‖ / ‖v_k‖`` is at most this, per method (for ADMM, from the
#: third iteration and only while ``c_k`` falls: after a warm start it first grows), or at
#: `AUTO_ITERATION_CAP`. A cold start (no previous frame's state) uses the stricter
#: `AUTO_COLD_STOP_CHANGE`: the chain's later frames build on it. Chosen on simulated videos,
#: see DEVELOPERS.md "Iterations".
AUTO_STOP_CHANGE = {"admm": 2e-2, "fista": 2e-2, "rl": 2e-2}
AUTO_COLD_STOP_CHANGE = {"admm": 5e-3, "fista": 5e-3, "rl": 5e-3}
AUTO_ITERATION_CAP = 300


def objective(volume_zyx: Any, frame_yx: Any, model: PSFModel, *, tv: float = 0.0,
              l1: float = 0.0, tv_z_weight: float = 1.0) -> float:
    """``½‖A v − b‖² + l1·Σv + tv·TV(v)`` in float64 (TV as in :mod:`volrecon.solvers.tv`)."""
    be = model.backend
    v = be.asarray(volume_zyx, dtype=model.dtype)
    residual = _residual(v, be.asarray(frame_yx), model)
    return _objective(v, residual, model, tv=tv, l1=l1, tv_z_weight=tv_z_weight)


def _residual(volume: Any, frame: Any, model: PSFModel) -> np.ndarray:
    """``A v − b`` on the host in float64 (one application of A)."""
    be = model.backend
    return be.to_numpy(model.forward(volume)).astype(np.float64) - np.asarray(
        be.to_numpy(frame), dtype=np.float64)


def _objective(volume: Any, residual: np.ndarray, model: PSFModel, *, tv: float, l1: float,
               tv_z_weight: float) -> float:
    value = 0.5 * squared_norm(residual)
    if l1:
        value += l1 * float(model.backend.to_numpy(volume).sum(dtype=np.float64))
    if tv:
        value += tv * tv_value(volume, tv_z_weight)
    return value


@overload
def reconstruct(frame_yx: Any, model: PSFModel, *, method: str = ...,
                iterations: int | str = ..., tv: float = ..., l1: float = ..., tol: float = ...,
                init: Any = ..., device: str | None = ..., threads: int | None = ...,
                tv_z_weight: float = ..., return_info: Literal[False] = ...) -> Array: ...
@overload
def reconstruct(frame_yx: Any, model: PSFModel, *, method: str = ...,
                iterations: int | str = ..., tv: float = ..., l1: float = ..., tol: float = ...,
                init: Any = ..., device: str | None = ..., threads: int | None = ...,
                tv_z_weight: float = ..., return_info: Literal[True],
                ) -> tuple[Array, SolveInfo]: ...


def reconstruct(
    frame_yx: Any,
    model: PSFModel,
    *,
    method: str = "admm",
    iterations: int | str = 100,
    tv: float = 0.0,
    l1: float = 0.0,
    tol: float = 1e-4,
    init: Any = None,
    device: str | None = None,
    threads: int | None = None,
    tv_z_weight: float = 1.0,
    return_info: bool = False,
) -> Array | tuple[Array, SolveInfo]:
    """Reconstruct the volume behind one camera frame.

    Minimises ``½‖A v − b‖² + l1·Σv + tv·TV(v)`` over ``v ≥ 0``, where ``A`` is
    ``model.forward`` and ``b`` the frame. ``TV(v) = Σ sqrt((Dy v)² + (Dx v)² + (w_z Dz v)²)``
    with forward differences, zero outside the lateral field (Dirichlet) and Neumann ends along
    depth; ``w_z`` is `tv_z_weight`. `l1` and `tv` are in the units of the model and the frame
    (the model is used as given: scale the PSF and the frame consistently).

    Parameters
    ----------
    frame_yx : ndarray of shape (Y, X)
        Background-subtracted camera frame, float; negative values are allowed (clipped to 0
        for "rl" only).
    model : PSFModel
        The forward model; ``frame_yx.shape`` must equal ``model.shape_out``.
    method : {"admm", "fista", "rl"}
        ADMM with the exact Fourier-domain volume update (shift-invariant models only),
        FISTA with restart, or Richardson–Lucy (minimises the Poisson deviance instead of the
        least-squares term; `l1` and `tv` enter its multiplicative update).
    iterations : int or "auto"
        Maximum iterations (≥ 1), or "auto": stop after the first iteration whose relative
        change of the volume is at most ``AUTO_STOP_CHANGE[method]`` after a warm start,
        ``AUTO_COLD_STOP_CHANGE[method]`` after a cold one (or when `tol` is met),
        at most `AUTO_ITERATION_CAP` iterations. Deterministic, so a resumed job repeats
        every bit.
    tv, l1 : float
        Regularisation weights (≥ 0).
    tol : float
        Stopping tolerance (≥ 0): normalised primal and dual residuals for ADMM, relative change
        of the volume for FISTA and RL. 0 runs all `iterations`.
    init : ndarray (Z, Y, X) or SolverState, optional
        Warm start: a volume, or ``info.state`` of a previous frame (ADMM then also reuses its
        duals and penalties).
    device : {"cpu", "gpu"}, optional
        Compute device. Default: the model's.
    threads : int, optional
        FFT threads on the CPU. Default: the model's.
    tv_z_weight : float
        Weight of depth differences in TV (> 0).
    return_info : bool
        Also return a :class:`SolveInfo` with diagnostics and the warm-start state.

    Returns
    -------
    volume : ndarray of shape (Z, Y, X), float32 (or the model's dtype), ≥ 0
        On the device of the computation (numpy on the CPU).
    info : SolveInfo
        Only with ``return_info=True``.

    Raises
    ------
    ShapeError
        If the frame or `init` shape does not match the model.
    DataError
        If the frame contains NaN or Inf.
    ConfigError
        For an unknown method, negative weights, ``iterations < 1`` or ADMM on a model
        without transfer functions.

    References
    ----------
    See :mod:`volrecon.solvers.admm`, :mod:`volrecon.solvers.fista`, :mod:`volrecon.solvers.rl`.

    Examples
    --------
    >>> import numpy as np, volrecon
    >>> psf = np.zeros((2, 16, 16), np.float32); psf[:, 8, 8] = 1.0
    >>> model = volrecon.PSFModel.from_stack(psf, depth_step_um=2.0, pixel_size_um=1.0)
    >>> frame = np.zeros((16, 16), np.float32); frame[5, 6] = 1.0
    >>> volume, info = volrecon.reconstruct(frame, model, method="fista", iterations=50,
    ...                                     return_info=True)
    >>> volume.shape, round(float(volume.sum()), 2)
    ((2, 16, 16), 1.0)
    """
    model, iterations, stop_change = _checked(model, method, iterations, tv=tv, l1=l1, tol=tol,
                                              tv_z_weight=tv_z_weight, init=init,
                                              device=device, threads=threads)
    be = model.backend
    if getattr(frame_yx, "ndim", None) != 2 or tuple(frame_yx.shape) != model.shape_out:
        raise ShapeError(
            f"frame must have shape (Y, X) = {model.shape_out} to match the model; "
            f"got {getattr(frame_yx, 'shape', None)}"
        )
    frame = be.asarray(frame_yx, dtype=model.dtype)
    if not bool(be.xp.isfinite(frame).all()):
        raise DataError("frame contains NaN or Inf pixels; repair or skip the frame")
    start = _check_init(init, model, method)
    t0 = time.perf_counter()
    options: dict[str, Any] = {}
    if method == "admm":
        options["stop_change"] = stop_change
    else:  # their `tol` is already a bound on the relative change of the volume
        tol = max(tol, stop_change)
    volume, n_iter, converged, state, history = _SOLVERS[method](
        frame, model, iterations=int(iterations), tv=float(tv), l1=float(l1), tol=float(tol),
        tv_z_weight=float(tv_z_weight), init=start, **options)
    if not return_info:
        return volume
    seconds = time.perf_counter() - t0
    info = _info(volume, frame, model, method=method, iterations=n_iter, converged=converged,
                 seconds=seconds, state=state, history=history, tv=tv, l1=l1,
                 tv_z_weight=tv_z_weight)
    return volume, info


def reconstruct_window(frames_tyx: Any, model: PSFModel, *, iterations: int | str = "auto",
                       tv: float = 0.0, l1: float = 0.0, tol: float = 1e-4,
                       tv_z_weight: float = 1.0, temporal_weight: float = 0.0,
                       init: SolverState | None = None,
                       ) -> tuple[Array, list[SolveInfo]]:
    """Reconstruct a window of consecutive frames together, with a temporal prior (ADMM).

    Minimises ``Σ_t [½‖A v_t − b_t‖² + l1·Σv_t + tv·TV(v_t)] + temporal_weight·½Σ_t‖v_{t+1} −
    v_t‖²`` over ``v_t ≥ 0`` (see :func:`volrecon.solvers.admm.solve_admm_window`); with one
    frame or ``temporal_weight = 0`` each frame's optimum is that of :func:`reconstruct`.

    Parameters
    ----------
    frames_tyx : ndarray of shape (W, Y, X)
        Consecutive corrected frames, all finite.
    model : PSFModel
        A shift-invariant model (with transfer functions).
    iterations, tv, l1, tol, tv_z_weight
        As for :func:`reconstruct` (the "auto" rule runs on the whole window).
    temporal_weight : float
        Weight of the temporal prior, >= 0.
    init : SolverState, optional
        The state of the window (or frame) before: its last frame starts every frame here.

    Returns
    -------
    volumes : ndarray of shape (W, Z, Y, X)
    infos : list of SolveInfo
        One per frame (objective and residual of that frame; iterations, time and state are
        the window's, the time split evenly).

    Raises
    ------
    ShapeError, DataError, ConfigError
        As for :func:`reconstruct`; ConfigError also for a negative `temporal_weight`.
    """
    if not (math.isfinite(temporal_weight) and temporal_weight >= 0):
        raise ConfigError(f"temporal_weight must be a finite number >= 0; got {temporal_weight!r}")
    model, n_max, stop_change = _checked(model, "admm", iterations, tv=tv, l1=l1, tol=tol,
                                         tv_z_weight=tv_z_weight, init=init, device=None,
                                         threads=None)
    be = model.backend
    if getattr(frames_tyx, "ndim", None) != 3 or tuple(frames_tyx.shape[1:]) != model.shape_out:
        raise ShapeError(f"frames must have shape (W, Y, X) with (Y, X) = {model.shape_out}; "
                         f"got {getattr(frames_tyx, 'shape', None)}")
    frames = be.asarray(frames_tyx, dtype=model.dtype)
    if not bool(be.xp.isfinite(frames).all()):
        raise DataError("a frame of the window contains NaN or Inf pixels; repair or skip it")
    start = init if isinstance(init, SolverState) and init.method == "admm" else None
    t0 = time.perf_counter()
    volumes, n_iter, converged, state, history = solve_admm_window(
        frames, model, iterations=n_max, tv=float(tv), l1=float(l1), tol=float(tol),
        tv_z_weight=float(tv_z_weight), temporal_weight=float(temporal_weight), init=start,
        stop_change=stop_change)
    seconds = (time.perf_counter() - t0) / len(frames)
    infos = [_info(volumes[t], frames[t], model, method="admm", iterations=n_iter,
                   converged=converged, seconds=seconds, state=state, history=history, tv=tv,
                   l1=l1, tv_z_weight=tv_z_weight) for t in range(len(frames))]
    return volumes, infos


def _checked(model: PSFModel, method: str, iterations: int | str, *, tv: float, l1: float,
             tol: float, tv_z_weight: float, init: Any, device: str | None,
             threads: int | None) -> tuple[PSFModel, int, float]:
    """Validate the settings; returns the model on its device, the iteration cap and the
    "auto" stop rule's bound on the relative change (0: none)."""
    if method not in METHODS:
        raise ConfigError(f"method must be one of {', '.join(METHODS)}; got {method!r}")
    stop_change = 0.0
    if iterations == "auto":
        warm = isinstance(init, SolverState) and init.method == method
        iterations = AUTO_ITERATION_CAP
        stop_change = (AUTO_STOP_CHANGE if warm else AUTO_COLD_STOP_CHANGE)[method]
    elif (isinstance(iterations, bool) or not isinstance(iterations, int | np.integer)
          or iterations < 1):
        raise ConfigError(f"iterations must be a positive integer or 'auto'; got {iterations!r}")
    for name, value in (("tv", tv), ("l1", l1), ("tol", tol)):
        if not (math.isfinite(value) and value >= 0):
            raise ConfigError(f"{name} must be a finite number >= 0; got {value!r}")
    if not (math.isfinite(tv_z_weight) and tv_z_weight > 0):
        raise ConfigError(f"tv_z_weight must be positive; got {tv_z_weight!r}")
    if device is not None or threads is not None:
        model = model.on_device(device or model.backend.device,
                                threads=threads or model.backend.threads)
    if method == "admm" and not model.shift_invariant:
        raise ConfigError(
            f"method 'admm' needs a shift-invariant model; {type(model).__name__} is not one — "
            "use method='fista' or 'rl'"
        )
    if model.backend.device == "cpu":
        keep_freed_memory()  # every iteration's volume-sized arrays: reused, not re-zeroed
    return model, int(iterations), stop_change


def _info(volume: Any, frame: Any, model: PSFModel, *, method: str, iterations: int,
          converged: bool, seconds: float, state: SolverState,
          history: dict[str, list[float]], tv: float, l1: float,
          tv_z_weight: float) -> SolveInfo:
    """Diagnostics of one frame; one application of A serves the objective and residual."""
    residual = _residual(volume, frame, model)
    value = _objective(volume, residual, model, tv=tv, l1=l1, tv_z_weight=tv_z_weight)
    frame_norm = math.sqrt(squared_norm(model.backend.to_numpy(frame).astype(np.float64)))
    relative = (math.sqrt(squared_norm(residual)) / frame_norm if frame_norm > 0
                else float("nan"))
    return SolveInfo(method, iterations, value, relative, converged, seconds, state, history)


def _check_init(init: Any, model: PSFModel, method: str) -> Any:
    if init is None:
        return None
    if isinstance(init, SolverState):
        if init.method != method:
            return _volume_from_state(init, model)
        return init
    if tuple(getattr(init, "shape", ())) != model.shape_in:
        raise ShapeError(f"init must have shape (Z, Y, X) = {model.shape_in}; "
                         f"got {getattr(init, 'shape', None)}")
    return model.backend.asarray(init, dtype=model.dtype)


def _volume_from_state(state: SolverState, model: PSFModel) -> Any:
    v = state.arrays["v"]
    _nz, ny, nx = model.shape_in
    return model.backend.xp.ascontiguousarray(v[:, :ny, :nx])
