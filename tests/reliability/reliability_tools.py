"""Helpers of the reliability tests: directory snapshots, CLI subprocesses with robust waits,
and a zarr store that runs out of space."""

from __future__ import annotations

import errno
import hashlib
import os
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import zarr

#: Generous: a deadline only ends a hung child; a quiet machine never waits for it.
DEADLINE_S = 600.0


def tree_snapshot(root: Path) -> dict[str, str]:
    """Every file and folder below `root`: relative path -> sha256 of the file ("dir" for
    folders)."""
    snapshot = {}
    for path in sorted(root.rglob("*")):
        key = path.relative_to(root).as_posix()
        if path.is_dir():
            snapshot[key] = "dir"
        else:
            snapshot[key] = hashlib.sha256(path.read_bytes()).hexdigest()
    return snapshot


def snapshot_changes(before: dict[str, str], after: dict[str, str]) -> dict[str, list[str]]:
    """Paths created, deleted and modified between two snapshots."""
    return {
        "created": sorted(set(after) - set(before)),
        "deleted": sorted(set(before) - set(after)),
        "modified": sorted(k for k in set(before) & set(after) if before[k] != after[k]),
    }


def cli_command(*argv: str) -> list[str]:
    """The ``volrecon`` command line as a subprocess runs it."""
    return [sys.executable, "-m", "volrecon.cli", *argv]


def run_cli(argv: Sequence[str], *, cwd: Path | None = None,
            env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """Run ``volrecon ARGV`` in a new process and wait for it (no short timeout)."""
    return subprocess.run(cli_command(*argv), cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=DEADLINE_S, check=False)


def start_cli(argv: Sequence[str], **kwargs: Any) -> subprocess.Popen[str]:
    """Start ``volrecon ARGV`` in a new process, stdout and stderr captured."""
    return subprocess.Popen(cli_command(*argv), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kwargs)


def finish(child: subprocess.Popen[str]) -> tuple[str, str]:
    """Wait for `child` to exit (however loaded the machine) and return its output."""
    try:
        return child.communicate(timeout=DEADLINE_S)
    except subprocess.TimeoutExpired:
        child.kill()
        _out, err = child.communicate()
        raise AssertionError(f"volrecon did not exit within {DEADLINE_S:.0f} s: {err}") from None


def wait_until(condition: Callable[[], bool], child: subprocess.Popen[str], *,
               what: str) -> None:
    """Poll `condition` until true; fail if `child` exits first or the deadline passes."""
    deadline = time.monotonic() + DEADLINE_S
    while time.monotonic() < deadline:
        if condition():
            return
        if child.poll() is not None:
            _out, err = child.communicate()
            raise AssertionError(f"run ended before {what}: rc {child.returncode}, {err}")
        time.sleep(0.01)
    child.kill()
    child.communicate()
    raise AssertionError(f"no {what} within {DEADLINE_S:.0f} s")


def one_error_line(err: str, command: str) -> str:
    """The single stderr line of a failed command (asserts there is exactly one)."""
    lines = err.splitlines()
    assert len(lines) == 1 and err.endswith("\n"), f"expected one line on stderr, got {err!r}"
    assert "Traceback" not in err
    assert lines[0].startswith(f"volrecon {command}: "), lines[0]
    return lines[0]


class FullDiskStore(zarr.storage.LocalStore):
    """A real LocalStore whose disk fills up: after `budget` chunk writes every further
    write raises ``OSError(ENOSPC)``, the way a full disk refuses ``write()``.

    Set :attr:`budget` (shared by every instance, as all of a run's stores share one disk)
    before use; ``None`` means unlimited.
    """

    budget: int | None = None
    written: int = 0

    async def set(self, key: str, value: Any) -> None:
        cls = type(self)
        if "/c/" in f"/{key}" and cls.budget is not None:
            if cls.written >= cls.budget:
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            cls.written += 1
        await super().set(key, value)
