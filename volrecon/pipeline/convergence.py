"""How many finished frames met their stopping rule, and how many stopped at the cap."""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from volrecon.pipeline.store import STATUS_DONE

__all__ = ["Convergence", "count_convergence", "store_convergence"]


@dataclass(frozen=True)
class Convergence:
    """Stopping of the finished frames of a store.

    Attributes
    ----------
    converged : int
        Done frames whose stopping rule was met (``tol``, or the "auto" rule).
    at_cap : int
        Done frames that ran every iteration allowed without meeting it.
    has_rule : bool
        False for settings that always run every iteration (a fixed count with ``tol = 0``).
    """

    converged: int
    at_cap: int
    has_rule: bool = True

    def advice(self) -> str | None:
        """One line for the user when frames stopped at the cap although the settings have a
        stopping rule that could stop them (``tol > 0`` or "auto"), else None."""
        if not self.at_cap or not self.has_rule:
            return None
        total = self.converged + self.at_cap
        return (f"{self.at_cap} of {total} finished frames stopped at the iteration cap "
                "without converging; raise [solver] iterations or use iterations = \"auto\"")


def count_convergence(diagnostics: Any, solver: dict[str, Any] | None = None) -> Convergence:
    """Count from a store's ``diagnostics`` group (or a mapping of its arrays); `solver` is
    the job's ``[solver]`` settings, if known."""
    status = np.asarray(diagnostics["status"][...])
    converged = np.asarray(diagnostics["converged"][...]).astype(bool)
    done = status == STATUS_DONE
    solver = solver or {}
    has_rule = solver.get("iterations", "auto") == "auto" or float(solver.get("tol", 1.0)) > 0
    return Convergence(int((done & converged).sum()), int((done & ~converged).sum()), has_rule)


def store_convergence(store_path: str | os.PathLike[str]) -> Convergence:
    """:func:`count_convergence` of the output store at `store_path` (read-only)."""
    import zarr

    group: Any = zarr.open_group(zarr.storage.LocalStore(os.fspath(store_path), read_only=True),
                                 mode="r")
    settings = dict(group.attrs.get("volrecon", {})).get("settings", {})
    return count_convergence(group["diagnostics"], settings.get("solver"))
