"""The store lock (live holder refused, dead holder taken over) and task planning."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys

import numpy as np
import pytest

from volrecon.errors import StoreLockedError
from volrecon.pipeline import StoreLock, plan_tasks
from volrecon.pipeline.lock import lock_path_for, read_lock


def _dead_pid() -> int:
    """The pid of a process that has exited (and was reaped)."""
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    return int(child.stdout)


def test_second_writer_refused_naming_the_holder(tmp_path):
    store = tmp_path / "out.zarr"
    with StoreLock(store) as held:
        assert held.held and read_lock(store)["pid"] == os.getpid()
        assert StoreLock.holder_alive(store)
        with pytest.raises(StoreLockedError, match=rf"pid {os.getpid()} on "):
            StoreLock(store).acquire()
    assert not lock_path_for(store).exists() and not StoreLock.holder_alive(store)
    StoreLock(store).acquire().release()  # free again


def test_stale_lock_of_dead_process_taken_over(tmp_path):
    store = tmp_path / "out.zarr"
    record = {"pid": _dead_pid(), "host": socket.gethostname(), "started": "earlier"}
    lock_path_for(store).write_text(json.dumps(record))
    assert not StoreLock.holder_alive(store)
    lock = StoreLock(store).acquire()
    try:
        assert lock.took_over == record
        assert read_lock(store)["pid"] == os.getpid()
    finally:
        lock.release()


def test_lock_held_by_another_live_process_refused(tmp_path):
    store = tmp_path / "out.zarr"
    code = ("import sys, time; from volrecon.pipeline import StoreLock; "
            f"StoreLock({str(store)!r}).acquire(); print('held', flush=True); time.sleep(30)")
    child = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "held"
        with pytest.raises(StoreLockedError, match=rf"pid {child.pid}"):
            StoreLock(store).acquire()
        child.kill()  # SIGKILL: no clean-up; the kernel drops the flock
        child.wait()
        with StoreLock(store) as lock:
            assert lock.took_over["pid"] == child.pid
    finally:
        if child.poll() is None:
            child.kill()
        child.stdout.close()


def _spans(tasks):
    return [(t.start, t.stop) for t in tasks]


def test_plan_whole_chains_rounded_up():
    status = np.zeros(10, np.uint8)
    # frames_per_task 4 with chains of 3 -> tasks of 2 chains (6 frames); last one short.
    assert _spans(plan_tasks(status, chain_frames=3, frames_per_task=4)) == [(0, 6), (6, 10)]
    assert _spans(plan_tasks(status, chain_frames=1, frames_per_task=4)) == [
        (0, 4), (4, 8), (8, 10)]
    assert [t.index for t in plan_tasks(status, chain_frames=1, frames_per_task=4)] == [0, 1, 2]


def test_plan_skips_done_chains_and_redoes_partial_ones():
    status = np.array([1, 1, 1, 1, 0, 1, 2, 2, 2, 0], np.uint8)  # 2 = failed counts as done
    # chains of 3: [0,3) done, [3,6) partly pending, [6,9) done, [9,10) pending
    assert _spans(plan_tasks(status, chain_frames=3, frames_per_task=6)) == [(3, 6), (9, 10)]
    assert plan_tasks(np.ones(5, np.uint8), chain_frames=2, frames_per_task=2) == []
