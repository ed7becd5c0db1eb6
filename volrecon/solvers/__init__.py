"""Solvers: pure array maths, one frame at a time (ADMM, FISTA, Richardson–Lucy).

:class:`SolverSettings` is the one settings type and :func:`solve_chain` the one warm-start
loop; every caller (jobs, estimate, tuning, previews, benchmarks) goes through them.
"""

from volrecon.solvers.chain import FrameResult, plan_windows, solve_chain, solve_frame
from volrecon.solvers.info import SolveInfo, SolverState
from volrecon.solvers.reconstruct import objective, reconstruct, reconstruct_window
from volrecon.solvers.settings import METHODS, SolverSettings
from volrecon.solvers.tv import tv_value

__all__ = [
    "METHODS",
    "FrameResult",
    "SolveInfo",
    "SolverSettings",
    "SolverState",
    "objective",
    "plan_windows",
    "reconstruct",
    "reconstruct_window",
    "solve_chain",
    "solve_frame",
    "tv_value",
]
