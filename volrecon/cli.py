"""The ``volrecon`` command: a thin layer of argument parsing over the library.

Each subcommand has one ``_add_<name>`` function that declares its arguments and one
``_run_<name>`` function that calls library code. Errors volrecon raises on purpose print as
one line on stderr with exit status 2; ``--debug`` shows the traceback instead. volrecon's
own warnings print once each as ``warning: <message>`` lines on stderr.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import warnings
from collections.abc import Callable, Sequence

from volrecon.errors import VolreconError, VolreconWarning

__all__ = ["main"]

Runner = Callable[[argparse.Namespace], int]


def _add_bench(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    from volrecon.bench import add_arguments

    p = sub.add_parser("bench", help="time the solvers against the FFT lower bound, "
                                     "general-purpose solvers, warm starts and memory")
    add_arguments(p)
    p.set_defaults(run=_run_bench)


def _run_bench(args: argparse.Namespace) -> int:
    from volrecon.bench import run

    return run(args)


def _add_calibrate(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "calibrate", help="turn a bead-scan TIFF into a PSF model and a report",
        description="Clean (offset, hot pixels, background, binning), register and compress "
        "a bead scan into a PSF model store; the report goes next to it (NAME.report/).")
    p.add_argument("stack", metavar="STACK.tif",
                   help="multi-page TIFF (Z, Y, X), or (K, Z, Y, X) with --positions")
    p.add_argument("--depth-step", type=float, required=True, metavar="UM",
                   help="depth between planes, micrometres")
    p.add_argument("--pixel-size", type=float, required=True, metavar="UM",
                   help="pixel pitch in the sample plane (before --bin), micrometres")
    p.add_argument("--depth-start", type=float, default=0.0, metavar="UM",
                   help="depth of the first plane, micrometres (default 0)")
    p.add_argument("--dark", metavar="F.tif", help="dark frame or stack of dark frames "
                   "(default: offset estimated from the image border)")
    p.add_argument("--wavelength", type=float, metavar="NM", help="emission wavelength, nm")
    p.add_argument("--bin", type=int, default=1, metavar="N", help="lateral binning (default 1)")
    p.add_argument("--crop", metavar="Y0:Y1,X0:X1", help="window of the raw image to keep")
    p.add_argument("--rank", metavar="N|auto", help="depth rank of the model: N kernels, or "
                   "'auto' by --energy (default: full rank)")
    p.add_argument("--energy", type=float, default=0.999, metavar="F",
                   help="energy fraction kept by --rank auto (default 0.999)")
    p.add_argument("--positions", metavar="P.csv", help="CSV of y_px,x_px per field position "
                   "(for a (K, Z, Y, X) scan): field-varying model")
    p.add_argument("--lenslet-pitch", type=int, metavar="N", help="lenslet pitch in pixels "
                   "(for a (Z, N, N, Y, X) scan of the sub-positions): lenslet model")
    p.add_argument("--normalise-planes", action="store_true",
                   help="scale every plane to unit sum (default: planes scaled together, so "
                   "the model keeps the measured relative throughput per depth)")
    p.add_argument("--out", required=True, metavar="MODEL", help="model store to write")
    p.set_defaults(run=_run_calibrate)


def _run_calibrate(args: argparse.Namespace) -> int:
    from volrecon.calibrate import calibrate_file, parse_crop, parse_rank

    if args.lenslet_pitch is not None:
        return _run_calibrate_lenslet(args)
    result = calibrate_file(
        args.stack, args.out, depth_step_um=args.depth_step, pixel_size_um=args.pixel_size,
        depth_start_um=args.depth_start, dark_path=args.dark, positions_path=args.positions,
        wavelength_nm=args.wavelength, bin_factor=args.bin,
        crop_yx=None if args.crop is None else parse_crop(args.crop),
        rank=parse_rank(args.rank), energy=args.energy,
        normalization="planes" if args.normalise_planes else "stack")
    print(result.report.summary_text())
    print(f"model written to {args.out}")
    return 0


def _run_calibrate_lenslet(args: argparse.Namespace) -> int:
    from volrecon.calibrate import calibrate_lenslet_file, default_report_dir
    from volrecon.errors import ConfigError

    ignored = [name for name, value in (("--wavelength", args.wavelength), ("--crop", args.crop),
                                        ("--rank", args.rank), ("--positions", args.positions))
               if value is not None] + (["--bin"] if args.bin != 1 else [])
    if ignored:
        raise ConfigError(f"--lenslet-pitch does not take {', '.join(ignored)}; drop them")
    calibrate_lenslet_file(
        args.stack, args.out, lenslet_pitch=args.lenslet_pitch, depth_step_um=args.depth_step,
        pixel_size_um=args.pixel_size, depth_start_um=args.depth_start, dark_path=args.dark,
        normalization="planes" if args.normalise_planes else "stack")
    report = default_report_dir(args.out)
    print(f"{(report / 'summary.txt').read_text()}model written to {args.out}; report in "
          f"{report}")
    return 0


def _add_run(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "run", help="reconstruct a video into a 4-D OME-Zarr store (resumable)",
        description="Run the job described by a TOML file. Running it again continues where "
        "it stopped; Ctrl-C stops cleanly. See workflows/README.md.")
    p.add_argument("job", metavar="JOB.toml", help="job file (see schemas/job.schema.json)")
    p.add_argument("--restart", action="store_true",
                   help="delete the job's existing store and start over (after checking the job)")
    p.add_argument("--no-progress", action="store_true", help="do not draw the progress bar")
    p.add_argument("--estimate", action="store_true",
                   help="reconstruct a few frames and print the expected duration and store "
                   "size of the whole job; writes nothing")
    p.set_defaults(run=_run_run)


def _run_run(args: argparse.Namespace) -> int:
    import signal

    from volrecon.pipeline import format_status, progress_bar, run_job, store_status
    from volrecon.pipeline.config import load_job
    from volrecon.pipeline.convergence import store_convergence

    job = load_job(args.job)
    if args.estimate:
        from volrecon.pipeline.estimate import estimate_job

        print(estimate_job(job).summary())
        return 0

    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, stop)  # batch systems stop jobs with SIGTERM
    try:
        with progress_bar(disable=True if args.no_progress else None) as progress:
            result = run_job(job, restart=args.restart, progress=progress)
    except KeyboardInterrupt:
        done = format_status(store_status(job.output_path))[0] if job.output_path.exists() \
            else "0"
        print(f"volrecon run: interrupted with {done} frames done; run the same command again "
              "to continue", file=sys.stderr)
        return 130
    finally:
        signal.signal(signal.SIGTERM, previous)
    rate = result.computed / result.seconds if result.seconds > 0 else 0.0
    print(f"{result.store_path}: {result.done}/{result.total} frames done, {result.failed} "
          f"failed; this run computed {result.computed} frames in {result.seconds:.1f} s "
          f"({rate:.3g} frames/s)")
    advice = store_convergence(result.store_path).advice()
    if advice:
        print(f"volrecon run: {advice}", file=sys.stderr)
    if result.failed:
        # Exit status 1: the job went on past frames that failed (NaN pixels, divergence).
        failures = store_status(result.store_path).failures
        first = f" (first: frame {min(failures)}: {failures[min(failures)]})" if failures else ""
        print(f"volrecon run: {result.failed} of {result.total} frames failed{first}; check "
              f"those video frames ('volrecon status {result.store_path}' lists them)",
              file=sys.stderr)
        return 1
    return 0


def _add_status(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "status", help="show how far a job's store is (first line: <done>/<total>)",
        description="Print <done>/<total> frames on the first line, then the state, failed "
        "frames, throughput and time left. Safe while a run is writing the store.")
    p.add_argument("store", metavar="OUT", help="the job's output store")
    p.set_defaults(run=_run_status)


def _run_status(args: argparse.Namespace) -> int:
    from volrecon.pipeline import format_status, store_status
    from volrecon.pipeline.convergence import store_convergence

    print("\n".join(format_status(store_status(args.store))))
    convergence = store_convergence(args.store)
    print(f"convergence: {convergence.converged} frames met the stopping rule, "
          f"{convergence.at_cap} stopped at the iteration cap")
    advice = convergence.advice()
    if advice:
        print(f"advice: {advice}")
    return 0


def _add_verify(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "verify", help="read every finished frame of a store; send damaged ones back",
        description="Read every chunk of every finished frame (volume, projections, "
        "diagnostics) and check its checksum. Exit 0 when all are intact; exit 1 with one "
        "line per damaged frame, which is marked pending so that the next 'volrecon run' of "
        "the job recomputes it.")
    p.add_argument("store", metavar="OUT", help="the job's output store")
    p.add_argument("--frames", metavar="a:b", default=None,
                   help="store frames a to b-1 (default all)")
    p.add_argument("--no-progress", action="store_true", help="do not draw the progress bar")
    p.set_defaults(run=_run_verify)


def _run_verify(args: argparse.Namespace) -> int:
    from volrecon.pipeline.verify import verify_progress_bar, verify_store

    with verify_progress_bar(disable=True if args.no_progress else None) as progress:
        report = verify_store(args.store, frames=args.frames, progress=progress)
    start, stop = report.frames
    if report.intact:
        print(f"{report.path}: frames {start}:{stop}: {report.checked} finished frames intact")
        return 0
    print("\n".join(report.lines()))
    print(f"volrecon verify: {len(report.damaged)} damaged frames marked pending; run the job "
          "again to recompute them", file=sys.stderr)
    return 1


def _add_export(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("export", help="write store volumes as an ImageJ hyperstack TIFF, a "
                       "movie (.mp4/.gif) or region traces (CSV)")
    p.add_argument("store", metavar="OUT", help="the job's output store")
    what = p.add_mutually_exclusive_group(required=True)
    what.add_argument("--tiff", metavar="F.tif", help="TIFF file to write")
    what.add_argument("--movie", metavar="F.mp4", help="movie to write (.mp4 H.264 or .gif) "
                      "with a scale bar and the time; finished frames only")
    what.add_argument("--traces", metavar="REGIONS.csv", help="regions CSV (as the napari "
                      "time-traces widget saves it): write their mean per frame to --out")
    p.add_argument("--out", metavar="F.csv", help="traces CSV to write (with --traces)")
    p.add_argument("--frames", metavar="a:b", default=None,
                   help="store frames a to b-1 (default all)")
    p.add_argument("--projection", default=None, metavar="max|z=K",
                   help="TIFF: 'max' exports the maximum along z instead of the volumes; "
                   "movie: 'max' (default) or plane 'z=K'")
    p.add_argument("--fps", type=float, default=10.0, metavar="N",
                   help="movie frames per second (default 10)")
    p.set_defaults(run=_run_export)


def _run_export(args: argparse.Namespace) -> int:
    from volrecon.errors import ConfigError

    if (args.out is not None) != (args.traces is not None):
        raise ConfigError("--traces REGIONS.csv and --out TRACES.csv go together; give both")
    if args.traces is not None:
        from volrecon.pipeline.export import export_traces

        print(export_traces(args.store, args.traces, args.out, frames=args.frames))
        return 0
    if args.movie is not None:
        from volrecon.pipeline.movie import export_movie

        result = export_movie(args.store, args.movie, projection=args.projection,
                              fps=args.fps, frames=args.frames)
        print(f"{result.path}: {len(result.frames)} frames at {result.fps:g} fps, scale bar "
              f"{result.scale_bar_um:g} µm; {result.skipped} frames not done skipped")
        return 0
    from volrecon.pipeline import export_tiff

    out = export_tiff(args.store, args.tiff, frames=args.frames, projection=args.projection)
    print(out)
    return 0


def _add_init(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "init", help="write a commented job file with every key and its default",
        description="Write a job file listing every key of schemas/job.schema.json with its "
        "description and default; the few values to edit (model, video, output paths, frame "
        "interval) are marked. Never overwrites.")
    p.add_argument("path", metavar="PATH", nargs="?", default="job.toml",
                   help="job file to write, or a folder for its job.toml (default job.toml)")
    p.set_defaults(run=_run_init)


def _run_init(args: argparse.Namespace) -> int:
    from volrecon.pipeline.template import write_job_template

    path = write_job_template(args.path)
    print(f"{path}: written; edit the values marked '<- edit', then run "
          f"'volrecon run {path} --estimate'")
    return 0


def _add_view(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "view", help="open output stores or PSF model stores in napari",
        description="Open stores in the napari viewer (needs the 'napari' extra and a display): "
        "a job's volumes as a 4-D image with a time slider, a PSF model as a 3-D image.")
    p.add_argument("stores", metavar="OUT", nargs="+", help="output store(s) or model store(s)")
    p.add_argument("--monitor", action="store_true", help="also open the job monitor")
    p.set_defaults(run=_run_view)


def _run_view(args: argparse.Namespace) -> int:
    from volrecon.napari.viewer import view

    return view(args.stores, monitor=args.monitor)


def _add_demo(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "demo", help="run the whole job on built-in synthetic data",
        description="Simulate a diffuser microscope imaging beads and a filament in a "
        "hydrogel, calibrate its bead scan, reconstruct its video into OME-Zarr and score "
        "the result against the truth.")
    p.add_argument("outdir", metavar="OUTDIR", help="directory for the demo's files")
    p.add_argument("--frames", type=int, default=40, help="video frames (default 40)")
    p.add_argument("--optics", choices=("diffuser", "lenslet"), default="diffuser",
                   help="simulated instrument: a diffuser in the pupil (default), or a "
                        "microlens array at the image plane (light field)")
    p.add_argument("--no-progress", action="store_true", help="do not draw the progress bar")
    p.set_defaults(run=_run_demo)


def _run_demo(args: argparse.Namespace) -> int:
    from volrecon.demo import run_demo
    from volrecon.pipeline import progress_bar

    with progress_bar(disable=True if args.no_progress else None) as progress:
        result = run_demo(args.outdir, n_frames=args.frames, optics=args.optics,
                          progress=progress)
    print(result.summary())
    return 0


def _add_tune(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    from volrecon.tune.tune import (
        DEFAULT_MAX_ITERATIONS,
        DEFAULT_REFERENCE_ITERATIONS,
        DEFAULT_SITES,
        DEFAULT_SWEEP_ITERATIONS,
        DEFAULT_TOLERANCE,
    )

    p = sub.add_parser(
        "tune", help="choose tv, l1 and iterations on a few frames; write them to a job file",
        description="Sweep tv x l1 (coarse to fine, in units of the back-projected noise) on "
        "a few frames spread through the video, score each setting without ground truth "
        "(discrepancy principle, held-out neighbouring frames, stability) or against "
        "--reference, pick the iteration count within --tolerance of the converged result, "
        "and write the values into a copy of the job file with a report.")
    p.add_argument("job", metavar="JOB.toml", help="job file (see schemas/job.schema.json)")
    p.add_argument("--frames", metavar="T1,T2,...", help="video frames to tune on (each needs "
                   "both neighbours); default: --sites frames spread through the job")
    p.add_argument("--sites", type=int, default=DEFAULT_SITES, metavar="N",
                   help=f"number of frames when --frames is not given (default {DEFAULT_SITES})")
    p.add_argument("--reference", metavar="REF.tif", help="registered reference z-stack on the "
                   "model grid (Z, Y, X); then the correlation after registration decides")
    target = p.add_mutually_exclusive_group()
    target.add_argument("--out", metavar="TUNED.toml",
                        help="job file to write (default: JOB.tuned.toml beside the job)")
    target.add_argument("--in-place", action="store_true",
                        help="write the tuned values into JOB.toml itself")
    p.add_argument("--report", metavar="DIR",
                   help="report folder (default: the written file's name + .report)")
    p.add_argument("--sweep-iterations", type=int, default=DEFAULT_SWEEP_ITERATIONS,
                   metavar="N", help="iterations per sweep reconstruction "
                   f"(default {DEFAULT_SWEEP_ITERATIONS})")
    p.add_argument("--max-iterations", type=int, default=DEFAULT_MAX_ITERATIONS, metavar="N",
                   help=f"largest iteration count considered (default {DEFAULT_MAX_ITERATIONS})")
    p.add_argument("--reference-iterations", type=int, default=DEFAULT_REFERENCE_ITERATIONS,
                   metavar="N", help="iterations of the converged chain "
                   f"(default {DEFAULT_REFERENCE_ITERATIONS})")
    p.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE, metavar="F",
                   help="accepted relative change from the converged result "
                   f"(default {DEFAULT_TOLERANCE:g})")
    p.add_argument("--gain", type=float, metavar="K",
                   help="camera gain, counts per electron (default: measured by photon transfer)")
    p.add_argument("--quiet", action="store_true", help="no progress lines on stderr")
    p.add_argument("--view", action="store_true", help="show the sweep in napari afterwards")
    p.set_defaults(run=_run_tune)


def _run_tune(args: argparse.Namespace) -> int:
    from pathlib import Path

    from volrecon.tune import check_output_path, tune_job, write_report, write_tuned_job
    from volrecon.tune.report import summary_text

    frames = None
    if args.frames is not None:
        try:
            frames = [int(part) for part in args.frames.split(",") if part.strip()]
        except ValueError:
            from volrecon.errors import ConfigError

            raise ConfigError(f"--frames {args.frames!r}: not a comma-separated list of video "
                              "frame numbers; write e.g. --frames 10,200,400") from None
    job_path = Path(args.job)
    out = job_path if args.in_place else Path(args.out) if args.out else \
        job_path.with_name(f"{job_path.stem}.tuned.toml")
    report = Path(args.report) if args.report else out.with_name(f"{out.stem}.report")
    check_output_path(out)
    check_output_path(report, what="--report", folder=True)
    result = tune_job(
        job_path, frames=frames, n_sites=args.sites, reference=args.reference,
        sweep_iterations=args.sweep_iterations, max_iterations=args.max_iterations,
        reference_iterations=args.reference_iterations, tolerance=args.tolerance,
        gain_adu_per_electron=args.gain,
        progress=None if args.quiet else lambda line: print(line, file=sys.stderr))
    write_report(result, report)
    write_tuned_job(result, out, report=report)
    print(summary_text(result), end="")
    print(f"tuned job written to {out}; report in {report}")
    if args.view:
        from volrecon.napari.sweep import view_sweep

        return view_sweep(result)
    return 0


_COMMANDS: list[Callable[[argparse._SubParsersAction], None]] = [  # type: ignore[type-arg]
    _add_demo,
    _add_bench,
    _add_calibrate,
    _add_run,
    _add_status,
    _add_verify,
    _add_export,
    _add_view,
    _add_tune,
    _add_init,
]


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``volrecon`` command."""
    from volrecon import __version__

    parser = argparse.ArgumentParser(
        prog="volrecon",
        description="Calibrate a single-shot 3-D microscope and reconstruct its video into "
        "4-D OME-Zarr volumes. Reconstructions are research images, not for diagnosis.",
    )
    parser.add_argument("--version", action="version", version=f"volrecon {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks and debug logs")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for add in _COMMANDS:
        add(sub)
    return parser


class _WarningLines:
    """Prints volrecon's warnings as ``warning: <message>`` lines on stderr, each text once.

    Only :class:`VolreconWarning` warnings reach the user (e.g. a rank above the usable
    singular values, an unreliable photon-transfer fit, a store resumed by another volrecon
    version); other libraries' warnings stay silent (``--debug`` shows them).
    """

    def __init__(self) -> None:
        self.seen: set[str] = set()

    def emit(self, message: object) -> None:
        text = " ".join(str(message).split())
        if text and text not in self.seen:
            self.seen.add(text)
            print(f"warning: {text}", file=sys.stderr)

    def showwarning(self, message: Warning | str, category: type[Warning], filename: str,
                    lineno: int, file: object = None, line: str | None = None) -> None:
        if issubclass(category, VolreconWarning):
            self.emit(message)


#: dask.distributed loggers whose warnings (a lost worker's rescheduled keys, nanny restarts)
#: volrecon reports itself, in its own lines and the run record; --debug shows them.
_DASK_LOGGERS = ("distributed", "distributed.client", "distributed.nanny",
                 "distributed.scheduler", "distributed.worker")


def _quiet_dask_logs() -> None:
    """Raise dask.distributed's loggers to ERROR, now and when it is imported later (it sets
    its levels from the dask config ``logging`` on import)."""
    import dask.config

    levels = dask.config.config.setdefault("logging", {})
    if isinstance(levels, dict):
        levels.update(dict.fromkeys(_DASK_LOGGERS, "error"))
    for name in _DASK_LOGGERS:
        logging.getLogger(name).setLevel(logging.ERROR)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``volrecon`` console script; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.ERROR,
                        format="%(levelname)s %(name)s: %(message)s")
    if args.debug:
        return int(args.run(args))
    # Library warnings and log chatter (tifffile logs on truncated files) would bury the one
    # line that tells the user what to do; --debug shows them. volrecon's own warnings are
    # printed, once each, as "warning:" lines.
    tifffile_logger = logging.getLogger("tifffile")
    tifffile_level = tifffile_logger.level
    tifffile_logger.setLevel(logging.CRITICAL)
    _quiet_dask_logs()
    lines = _WarningLines()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            warnings.filterwarnings("always", category=VolreconWarning)  # lines dedupes
            warnings.showwarning = lines.showwarning
            return int(args.run(args))
    except VolreconError as exc:
        message = " ".join(str(exc).split())  # one line, even if a cause spans several
        print(f"volrecon {args.command}: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"volrecon {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` or a pager that quit: not an error
        # Python would report the pipe again while flushing stdout at exit.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    finally:
        tifffile_logger.setLevel(tifffile_level)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
