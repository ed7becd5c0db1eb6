"""Solvers: pure array maths, one frame at a time (ADMM, FISTA, Richardson–Lucy)."""

from volrecon.solvers.info import SolveInfo, SolverState
from volrecon.solvers.reconstruct import METHODS, objective, reconstruct
from volrecon.solvers.tv import tv_value

__all__ = ["METHODS", "SolveInfo", "SolverState", "objective", "reconstruct", "tv_value"]
