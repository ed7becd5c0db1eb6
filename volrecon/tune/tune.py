"""``tune_job``: choose tv, l1 and the iteration count of a job on a few of its frames.

Order of work (nothing is written; see :func:`volrecon.tune.write_tuned_job` and
:func:`volrecon.tune.write_report` for the outputs):

1. the job's inputs are opened and checked as ``volrecon run`` would
   (:func:`volrecon.pipeline.job.prepare_job`);
2. a few *sites* (a frame with both neighbours) spread through the job's frames are read and
   corrected (:mod:`volrecon.tune.sites`);
3. the noise of the corrected frames is estimated from the dark stack and the frames
   themselves (:mod:`volrecon.tune.noise`);
4. a coarse tv × l1 grid, then a fine one around its best cell, is reconstructed on every
   site in parallel through dask (:mod:`volrecon.tune.sweep`, :mod:`volrecon.tune.execute`)
   and scored (:mod:`volrecon.tune.criteria`);
5. with ``temporal_window > 1``, ``temporal_weight`` is swept at the chosen tv and l1 on
   runs of consecutive frames, every other frame held out (:mod:`volrecon.tune.temporal`);
6. for the chosen weights, the iteration count is the smallest within a tolerance of the
   converged warm-start chain (:mod:`volrecon.tune.iterations`);
7. the chosen weights and ``tv = l1 = 0`` are both reconstructed at that count and scored
   by the same rule: the sweep ran fewer iterations, where stopping early regularises too,
   so weights that no longer beat ``tv = l1 = 0`` at the job's count are dropped.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import os
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from volrecon.errors import ConfigError, DataError, ShapeError, VolreconWarning
from volrecon.tune.criteria import Choice, choose_cell, stabilities
from volrecon.tune.execute import run_calls
from volrecon.tune.iterations import IterationCheck, candidate_counts, chain_error
from volrecon.tune.noise import FrameNoise, dark_statistics, estimate_frame_noise
from volrecon.tune.reference import registered_correlation
from volrecon.tune.sites import Site, choose_site_frames, read_sites
from volrecon.tune.solve import SiteSolve, solve_chain, solve_site
from volrecon.tune.sweep import (
    COARSE_L1_UNITS,
    COARSE_TV_UNITS,
    FINE_STEP,
    SweepCell,
    fine_grid,
    weight_unit,
)
from volrecon.tune.temporal import TemporalSweep, read_runs, run_length, sweep_temporal_weight

if TYPE_CHECKING:
    from volrecon.models.base import Geometry, PSFModel
    from volrecon.pipeline.config import JobConfig
    from volrecon.solvers import SolverSettings

__all__ = ["TuneResult", "tune_job"]

logger = logging.getLogger(__name__)

#: Defaults of :func:`tune_job` (also used by the CLI).
DEFAULT_SITES = 2
DEFAULT_SWEEP_ITERATIONS = 40
DEFAULT_MAX_ITERATIONS = 160
DEFAULT_REFERENCE_ITERATIONS = 240
DEFAULT_TOLERANCE = 0.1


@dataclass(frozen=True, eq=False)
class TuneResult:
    """What a tuning run measured and chose.

    Attributes
    ----------
    job : JobConfig
        The job tuned.
    sites : tuple of Site
        The frames used (each with its neighbours).
    noise : FrameNoise
        Noise of the corrected frames.
    weight_unit : float
        ``u``, the unit of the sweep's weights.
    sweep_iterations : int
        Iterations per reconstruction of the sweep (each from scratch).
    cells : tuple of SweepCell
        Every setting tried, coarse stage first.
    choice : Choice
        Which cell the sweep chose and by which criterion.
    index : int
        The cell finally chosen: ``choice.index``, or the ``tv = l1 = 0`` cell when that
        scored better at the chosen iteration count (see `confirmation`).
    confirmation : str
        "kept", or why the sweep's choice was replaced.
    iterations : IterationCheck
        The iteration count and the errors behind it.
    chosen_check, baseline_check : SweepCell
        The chosen weights and ``tv = l1 = 0`` at the chosen iteration count (stage 2; the
        same cell twice when the confirmation chose ``tv = l1 = 0``).
    reference_path : str or None
        The reference volume, if one was given.
    seconds : float
        Wall-clock time of the run.
    geometry : Geometry
        Sampling of the model's volume grid (for display).
    temporal : TemporalSweep or None
        The temporal-weight sweep (None when the job's ``temporal_window`` is 1).
    """

    job: JobConfig
    sites: tuple[Site, ...] = field(repr=False)
    noise: FrameNoise = field(repr=False)
    weight_unit: float
    sweep_iterations: int
    cells: tuple[SweepCell, ...] = field(repr=False)
    choice: Choice
    index: int
    confirmation: str
    iterations: IterationCheck
    chosen_check: SweepCell = field(repr=False)
    baseline_check: SweepCell = field(repr=False)
    reference_path: str | None
    seconds: float
    geometry: Geometry
    temporal: TemporalSweep | None = field(default=None, repr=False)

    @property
    def chosen(self) -> SweepCell:
        """The cell finally chosen (its weights go into the job file)."""
        return self.cells[self.index]

    @property
    def tv(self) -> float:
        """Chosen TV weight, rounded to 3 significant digits (as written to the job)."""
        return _round(self.chosen.tv)

    @property
    def l1(self) -> float:
        """Chosen l1 weight, rounded to 3 significant digits (as written to the job)."""
        return _round(self.chosen.l1)

    @property
    def temporal_weight(self) -> float | None:
        """Chosen temporal weight (as written to the job), None without a temporal sweep."""
        return None if self.temporal is None else self.temporal.weight

    @property
    def iteration_count(self) -> int:
        """Chosen iteration limit."""
        return self.iterations.chosen

    @property
    def site_frames(self) -> tuple[int, ...]:
        """Video frames tuned on."""
        return tuple(site.frame for site in self.sites)


def _round(value: float) -> float:
    return float(f"{value:.3g}") if value else 0.0


def _read_reference(reference: str | os.PathLike[str] | np.ndarray, model: PSFModel
                    ) -> tuple[np.ndarray, str | None]:
    if isinstance(reference, np.ndarray):
        volume, name = np.asarray(reference, dtype=np.float32), None
    else:
        from volrecon.io import read_tiff_stack

        name = os.fspath(reference)
        volume = read_tiff_stack(name, what="reference z-stack", key="--reference").astype(
            np.float32)
    where = name or "reference"
    if volume.shape != tuple(model.shape_in):
        raise ShapeError(
            f"{where}: has shape {volume.shape} but the model grid is {tuple(model.shape_in)} "
            "(Z, Y, X); resample the reference z-stack onto the model's planes and pixels"
        )
    if not np.all(np.isfinite(volume)):
        raise DataError(f"{where}: holds NaN or Inf; give a clean z-stack")
    return volume, name


def _cells(model: PSFModel, sites: Sequence[Site], noise: FrameNoise, unit: float,
           settings: Sequence[tuple[float, float]], iterations: int, call: SolverSettings,
           job: JobConfig, stage: int, reference: np.ndarray | None, client: Any
           ) -> list[SweepCell]:
    """Reconstruct every setting on every site and score it."""
    calls = [(site.frames_3yx, tv * unit, l1 * unit, iterations, call)
             for tv, l1 in settings for site in sites]
    solved: list[SiteSolve] = run_calls(solve_site, model, calls, job.compute, client=client)
    expected = [noise.expected_residual_energy(site.frames_3yx[1]) for site in sites]
    # Noise of the held-out target (b₋ + b₊)/2: (Σσ²₋ + Σσ²₊)/4 (the dark mean is shared
    # by all three frames and cancels from the comparison, so it is left out).
    target_noise = [0.25 * float(noise.variance(site.frames_3yx[0]).sum()
                                 + noise.variance(site.frames_3yx[2]).sum()) for site in sites]
    n_pixels = float(np.prod(model.shape_out))
    cells = []
    for k, (tv, l1) in enumerate(settings):
        results = solved[k * len(sites):(k + 1) * len(sites)]
        volumes = np.stack([r.volume for r in results])
        cells.append(SweepCell(
            tv_units=float(tv), l1_units=float(l1), tv=float(tv * unit), l1=float(l1 * unit),
            stage=stage,
            discrepancy=tuple(r.residual_energy / e for r, e in zip(results, expected,
                                                                      strict=True)),
            prediction_error=tuple((r.holdout_energy - n) / n_pixels
                                   for r, n in zip(results, target_noise, strict=True)),
            reference=None if reference is None else tuple(
                registered_correlation(v, reference).correlation for v in volumes),
            stability=math.nan, volumes=volumes, seconds=float(sum(r.seconds for r in results))))
    return cells


def _choose(cells: Sequence[SweepCell], reference: bool) -> Choice:
    return choose_cell([c.mean_discrepancy for c in cells],
                       [c.mean_prediction_error for c in cells],
                       [c.tv_units + c.l1_units for c in cells],
                       reference=[c.mean_reference or math.nan for c in cells] if reference
                       else None)


def _chain_frames(site: Site, warm_start: bool) -> list[np.ndarray]:
    """The site's frames as chains: one warm chain, or one chain per frame without warm start."""
    frames = site.frames_3yx
    return [frames] if warm_start else [frames[k:k + 1] for k in range(len(frames))]


def _run_chains(model: PSFModel, sites: Sequence[Site], tv: float, l1: float, iterations: int,
                call: SolverSettings, job: JobConfig, client: Any) -> list[np.ndarray]:
    pieces = [(site_index, chain) for site_index, site in enumerate(sites)
              for chain in _chain_frames(site, job.solver.warm_start)]
    results = run_calls(solve_chain, model,
                        [(chain, tv, l1, iterations, call) for _, chain in pieces],
                        job.compute, client=client)
    out = []
    for site_index in range(len(sites)):
        out.append(np.concatenate([r for (i, _), r in zip(pieces, results, strict=True)
                                   if i == site_index]))
    return out


def tune_job(job: JobConfig | str | os.PathLike[str], *, frames: Sequence[int] | None = None,
             n_sites: int = DEFAULT_SITES,
             reference: str | os.PathLike[str] | np.ndarray | None = None,
             sweep_iterations: int = DEFAULT_SWEEP_ITERATIONS,
             max_iterations: int = DEFAULT_MAX_ITERATIONS,
             reference_iterations: int = DEFAULT_REFERENCE_ITERATIONS,
             tolerance: float = DEFAULT_TOLERANCE,
             gain_adu_per_electron: float | None = None, client: Any = None,
             progress: Callable[[str], None] | None = None) -> TuneResult:
    """Choose ``tv``, ``l1``, ``iterations`` (and ``temporal_weight``) from a few frames.

    Parameters
    ----------
    job : JobConfig or path
        The job, or its TOML file. Its ``[solver]`` method, ``tol``, ``tv_z_weight`` and
        warm-start settings are kept; its ``[compute]`` settings spread the work.
    frames : sequence of int, optional
        Video frames to tune on (each needs both neighbours). Default: `n_sites` frames
        spread through the job's frame range.
    n_sites : int
        Number of frames when `frames` is not given (≥ 1).
    reference : path or ndarray of shape (Z, Y, X), optional
        A registered reference volume of the same sample on the model grid (a TIFF z-stack
        with one page per plane). Then the correlation after registration chooses.
    sweep_iterations : int
        Iterations of each sweep reconstruction (from scratch), ≥ 1.
    max_iterations : int
        Largest iteration count considered (≥ 1).
    reference_iterations : int
        Iterations per frame of the converged chain (> `max_iterations`).
    tolerance : float
        Largest accepted relative change from the converged result (0 < tolerance < 1).
    gain_adu_per_electron : float, optional
        The camera's gain when known; otherwise it is measured by photon transfer.
    client : distributed.Client, optional
        Run on this dask.distributed client instead of ``[compute] scheduler``.
    progress : callable, optional
        Called with a one-line message at each stage.

    Returns
    -------
    TuneResult

    Raises
    ------
    ConfigError
        For a bad job or option (naming it), or a video shorter than 3 frames.
    InputFileError, ModelStoreError, ShapeError
        If an input cannot be read or does not match the model.
    DataError
        If the noise cannot be estimated (no shot noise visible) or every
        reconstruction failed.

    Notes
    -----
    The criteria, their sources and the weight unit are described in
    :mod:`volrecon.tune.criteria` and :mod:`volrecon.tune.sweep`.
    """
    from volrecon.pipeline.config import JobConfig, load_job
    from volrecon.pipeline.execute import fft_threads_per_task
    from volrecon.pipeline.job import prepare_job

    started = time.perf_counter()
    say = progress or (lambda message: None)
    for name, value, low in (("sweep_iterations", sweep_iterations, 1),
                             ("max_iterations", max_iterations, 1),
                             ("n_sites", n_sites, 1)):
        if not (isinstance(value, int) and value >= low):
            raise ConfigError(f"{name} must be an integer >= {low}; got {value!r}")
    if not reference_iterations > max_iterations:
        raise ConfigError(f"reference_iterations ({reference_iterations}) must exceed "
                          f"max_iterations ({max_iterations}) so the reference is converged "
                          "further than any candidate")
    if not 0.0 < tolerance < 1.0:
        raise ConfigError(f"tolerance must lie between 0 and 1; got {tolerance!r}")
    if gain_adu_per_electron is not None and not (
            math.isfinite(gain_adu_per_electron) and gain_adu_per_electron > 0):
        raise ConfigError(f"the camera gain must be positive; got {gain_adu_per_electron!r}")
    if not isinstance(job, JobConfig):
        job = load_job(job)
    prepared = prepare_job(job)
    model, source, correction = prepared.model, prepared.source, prepared.correction
    reference_volume, reference_name = (None, None) if reference is None else \
        _read_reference(reference, model)
    site_frames = choose_site_frames(prepared.first_frame,
                                     prepared.first_frame + prepared.n_frames,
                                     source.n_frames, count=n_sites, frames=frames,
                                     where=source.description)
    sites = read_sites(source, correction, site_frames)
    say(f"tuning on video frames {', '.join(map(str, site_frames))} (each with its "
        "neighbours)")

    dark_variance, dark_frames = None, 0
    if job.dark_path is not None:
        _, variance, dark_frames = dark_statistics(str(job.dark_path))
        dark_variance = variance if dark_frames > 1 else None
    noise = estimate_frame_noise([s.frames_3yx for s in sites], correction,
                                 dark_variance_yx=dark_variance, dark_frames=dark_frames,
                                 gain_adu_per_electron=gain_adu_per_electron,
                                 where=source.description)
    unit = weight_unit(model, noise, sites)
    say(f"noise: gain {noise.gain_adu_per_electron:.4g} counts per electron, read variance "
        f"{float(noise.intercept_yx.mean()):.4g} counts^2; weight unit u = {unit:.4g}")

    call = job.solver
    model = model.on_device(job.compute.device, threads=fft_threads_per_task(job.compute) or 1)
    coarse = [(t, w) for t in COARSE_TV_UNITS for w in COARSE_L1_UNITS]
    say(f"coarse sweep: {len(coarse)} settings x {len(sites)} frames, {sweep_iterations} "
        "iterations each")
    cells = _cells(model, sites, noise, unit, coarse, sweep_iterations, call, job, 0,
                   reference_volume, client)
    best = cells[_choose(cells, reference_volume is not None).index]
    fine = fine_grid(best.tv_units, best.l1_units, coarse)
    say(f"fine sweep: {len(fine)} settings around tv = {best.tv_units:.3g} u, "
        f"l1 = {best.l1_units:.3g} u")
    cells += _cells(model, sites, noise, unit, fine, sweep_iterations, call, job, 1,
                    reference_volume, client)
    best = cells[_choose(cells, reference_volume is not None).index]
    edges = _upper_edges(cells, best, unit, widened=False)
    if edges:
        wider = fine_grid(best.tv_units, best.l1_units, [(c.tv_units, c.l1_units) for c in cells])
        say(f"widening the sweep once more: {len(wider)} settings past the {edges} edge")
        cells += _cells(model, sites, noise, unit, wider, sweep_iterations, call, job, 1,
                        reference_volume, client)
        _upper_edges(cells, cells[_choose(cells, reference_volume is not None).index], unit,
                     widened=True)
    stable = stabilities([(c.tv_units, c.l1_units) for c in cells], [c.volumes for c in cells])
    cells = [_replace_stability(c, s) for c, s in zip(cells, stable, strict=True)]
    choice = _choose(cells, reference_volume is not None)
    chosen = cells[choice.index]
    say(f"chosen by {choice.criterion}: tv = {chosen.tv:.3g} ({chosen.tv_units:.3g} u), "
        f"l1 = {chosen.l1:.3g} ({chosen.l1_units:.3g} u)")
    temporal = None
    if call.temporal_window > 1:
        length = run_length(call.temporal_window, source.n_frames)
        starts, runs = read_runs(source, correction, site_frames, length)
        say(f"temporal sweep: runs of {length} frames from video frames "
            f"{', '.join(map(str, starts))}, every other frame held out")
        temporal = sweep_temporal_weight(model, runs, noise, tv=chosen.tv, l1=chosen.l1,
                                         iterations=sweep_iterations, settings=call,
                                         compute=job.compute, run_frames=starts,
                                         client=client)
        call = dataclasses.replace(call, temporal_weight=temporal.weight)
        say(f"chosen temporal_weight = {temporal.weight:.3g} "
            f"({temporal.chosen.weight_units:.3g} |A|^2)")

    # Iterations on as many sites as there are workers (the chains run in parallel).
    order = sorted(range(len(sites)), key=lambda i: abs(i - (len(sites) - 1) / 2))
    chain_sites = [sites[i] for i in sorted(order[:max(1, min(job.compute.workers,
                                                               len(sites)))])]
    reference_call = dataclasses.replace(call, tol=0.0)
    say(f"iterations: converged chain of {reference_iterations} iterations per frame, then "
        f"candidates up to {max_iterations} (tolerance {tolerance:g})")
    converged = _run_chains(model, chain_sites, chosen.tv, chosen.l1, reference_iterations,
                            reference_call, job, client)
    counts, errors, colds, warms = [], [], [], []
    for count in candidate_counts(max_iterations):
        chains = _run_chains(model, chain_sites, chosen.tv, chosen.l1, count, call, job,
                             client)
        total, cold, warm = chain_error(chains, converged,
                                        chain_frames=job.solver.chain_frames)
        counts.append(count)
        errors.append(total)
        colds.append(cold)
        warms.append(warm)
        say(f"  {count} iterations: {total:.3f} from the converged result")
        if total <= tolerance:
            break
    within = errors[-1] <= tolerance
    check = IterationCheck(counts=tuple(counts), errors=tuple(errors), cold_errors=tuple(colds),
                           warm_errors=tuple(warms), reference_iterations=reference_iterations,
                           tolerance=tolerance, chain_frames=job.solver.chain_frames,
                           chosen=counts[-1], within_tolerance=within)
    # Confirmation at the job's iteration count: the sweep ran fewer iterations, where
    # stopping early regularises too; the weights must still beat tv = l1 = 0 here.
    final = _cells(model, sites, noise, unit, [(chosen.tv_units, chosen.l1_units), (0.0, 0.0)],
                   check.chosen, call, job, 2, reference_volume, client)
    index, confirmation = choice.index, "kept"
    if (chosen.tv_units, chosen.l1_units) != (0.0, 0.0) and \
            _choose(final, reference_volume is not None).index == 1:
        index = next(i for i, c in enumerate(cells) if (c.tv_units, c.l1_units) == (0.0, 0.0))
        confirmation = (f"at {check.chosen} iterations tv = l1 = 0 scored better by "
                        f"{choice.criterion} than the sweep's choice (tv = {chosen.tv:.3g}, "
                        f"l1 = {chosen.l1:.3g}), so no regularisation is written")
        final = [final[1], final[1]]
    say(f"confirmation at {check.chosen} iterations: {confirmation}")
    return TuneResult(job=job, sites=sites, noise=noise, weight_unit=unit,
                      sweep_iterations=sweep_iterations, cells=tuple(cells), choice=choice,
                      index=index, confirmation=confirmation, iterations=check,
                      chosen_check=final[0], baseline_check=final[1],
                      reference_path=reference_name, seconds=time.perf_counter() - started,
                      geometry=model.geometry, temporal=temporal)


def _upper_edges(cells: Sequence[SweepCell], best: SweepCell, unit: float, *, widened: bool
                 ) -> str:
    """Warn (one line per weight) when `best` lies on the upper edge of the computed grid.

    Returns the weights concerned ("tv", "l1", "tv and l1" or ""). Zero is a true lower
    bound of both weights, so only the upper edge counts.
    """
    names = []
    for name, value in (("tv", best.tv_units), ("l1", best.l1_units)):
        values = [c.tv_units if name == "tv" else c.l1_units for c in cells]
        if value > 0 and value == max(values):
            names.append(name)
            what = ("is still on the upper edge of the sweep after widening once; the best "
                    "value may lie beyond it: check the report and the frames' noise"
                    if widened else "lies on the upper edge of the sweep; widening it once "
                    f"more to {value * FINE_STEP:.3g} u")
            warnings.warn(f"tune: the best {name} = {value * unit:.3g} ({value:.3g} u) {what}",
                          VolreconWarning, stacklevel=3)
    return " and ".join(names)


def _replace_stability(cell: SweepCell, value: float) -> SweepCell:
    return dataclasses.replace(cell, stability=float(value))
