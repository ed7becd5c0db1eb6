"""Choosing a job's solver settings (tv, l1, temporal_weight, iterations) on a few frames.

- :func:`tune_job` runs the sweep and returns a :class:`TuneResult`;
- :func:`write_tuned_job` writes the chosen values into a copy of the job file (or the file
  itself); :func:`write_report` writes the report folder.
- The pieces: noise estimation (:mod:`~volrecon.tune.noise`), the sweep grid
  (:mod:`~volrecon.tune.sweep`), the criteria (:mod:`~volrecon.tune.criteria`), the
  temporal-weight sweep (:mod:`~volrecon.tune.temporal`), the
  iteration check (:mod:`~volrecon.tune.iterations`), scoring against a reference
  (:mod:`~volrecon.tune.reference`).
"""

from volrecon.tune.criteria import CRITERIA, Choice, choose_cell
from volrecon.tune.iterations import IterationCheck
from volrecon.tune.jobfile import check_output_path, tuned_document, write_tuned_job
from volrecon.tune.noise import FrameNoise, dark_statistics, estimate_frame_noise
from volrecon.tune.reference import RegisteredScore, estimate_volume_shift, registered_correlation
from volrecon.tune.report import report_dict, summary_text, write_report
from volrecon.tune.sites import Site, choose_site_frames
from volrecon.tune.sweep import SweepCell, weight_unit
from volrecon.tune.temporal import TemporalCell, TemporalSweep, sweep_temporal_weight
from volrecon.tune.tune import TuneResult, tune_job

__all__ = [
    "CRITERIA",
    "Choice",
    "FrameNoise",
    "IterationCheck",
    "RegisteredScore",
    "Site",
    "SweepCell",
    "TemporalCell",
    "TemporalSweep",
    "TuneResult",
    "check_output_path",
    "choose_cell",
    "choose_site_frames",
    "dark_statistics",
    "estimate_frame_noise",
    "estimate_volume_shift",
    "registered_correlation",
    "report_dict",
    "summary_text",
    "sweep_temporal_weight",
    "tune_job",
    "tuned_document",
    "weight_unit",
    "write_report",
    "write_tuned_job",
]
