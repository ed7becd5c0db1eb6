"""One writer per output store: a lock file beside the store, holding the writer's pid and host.

The lock is an advisory ``flock`` on ``<store>.lock``; the kernel drops it when the holder dies
(also on SIGKILL), so a lock left by a dead process is recognised as stale and taken over.
Where the file system refuses ``flock`` (some network mounts), the pid and host recorded in the
file decide: a dead pid on this host is stale, a live one or another host's holds the lock.
The file sits beside the store, not inside it, because zarr warns about foreign files in a
hierarchy.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import json
import logging
import os
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from volrecon.errors import StoreLockedError

__all__ = ["StoreLock", "lock_path_for", "read_lock"]

logger = logging.getLogger(__name__)
#: errno values meaning "this file system does not do flock".
_NO_FLOCK = (errno.ENOLCK, errno.EOPNOTSUPP, errno.ENOSYS)


def lock_path_for(store_path: str | os.PathLike[str]) -> Path:
    """The lock file of the store at `store_path`: ``<store>.lock`` beside it."""
    store = Path(store_path)
    return store.with_name(store.name + ".lock")


def read_lock(store_path: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The holder recorded in a store's lock file (pid, host, started), or None if there is none.

    A record is only a claim: use :meth:`StoreLock.holder_alive` to know whether it is live.
    """
    try:
        text = lock_path_for(store_path).read_text(encoding="utf-8")
    except (FileNotFoundError, IsADirectoryError):
        return None
    try:
        record = json.loads(text)
    except json.JSONDecodeError:
        return {}
    return record if isinstance(record, dict) else {}


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@dataclass(eq=False)
class StoreLock:
    """The exclusive right to write one output store.

    Use as a context manager, or call :meth:`acquire` / :meth:`release`.

    Attributes
    ----------
    store_path : Path
        The store being guarded.
    took_over : dict or None
        After :meth:`acquire`: the record of a dead holder whose stale lock was taken over.
    """

    store_path: Path
    took_over: dict[str, Any] | None = None
    _fd: int | None = field(default=None, repr=False)

    @property
    def path(self) -> Path:
        """The lock file."""
        return lock_path_for(self.store_path)

    def acquire(self) -> StoreLock:
        """Take the lock or raise StoreLockedError naming the live holder.

        Raises
        ------
        StoreLockedError
            If another live process holds the lock.
        """
        if self._fd is not None:
            return self
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(20):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                try:
                    flocked = _flock_exclusive(fd)
                except BlockingIOError:
                    raise self._locked_error(self._read_fd(fd)) from None
                previous = self._read_fd(fd)
                if not flocked and not self._stale_without_flock(previous):
                    raise self._locked_error(previous)
                # The file may have been removed (and re-created) by a releasing holder
                # between our open and our lock: then we hold a lock on a dead inode.
                try:
                    same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
                except FileNotFoundError:
                    same = False
                if not same:
                    os.close(fd)
                    continue
            except BaseException:
                with contextlib.suppress(OSError):
                    os.close(fd)
                raise
            if previous and previous.get("pid") is not None:
                self.took_over = previous
                logger.warning("%s: took over a stale lock of pid %s on %s (that process is "
                               "gone)", self.store_path, previous.get("pid"), previous.get("host"))
            record = {"pid": os.getpid(), "host": socket.gethostname(),
                      "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
            os.ftruncate(fd, 0)
            os.pwrite(fd, json.dumps(record).encode(), 0)
            os.fsync(fd)
            self._fd = fd
            return self
        raise StoreLockedError(f"{self.path}: could not take the lock (it keeps changing); retry")

    def release(self) -> None:
        """Give the lock up and remove the lock file (no-op when not held)."""
        if self._fd is None:
            return
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()
        with contextlib.suppress(OSError):
            fcntl.flock(self._fd, fcntl.LOCK_UN)
        os.close(self._fd)
        self._fd = None

    @property
    def held(self) -> bool:
        """True while this object holds the lock."""
        return self._fd is not None

    def __enter__(self) -> StoreLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()

    @staticmethod
    def holder_alive(store_path: str | os.PathLike[str]) -> bool:
        """True when a live process holds the store's lock (checked without taking it)."""
        path = lock_path_for(store_path)
        try:
            fd = os.open(path, os.O_RDONLY)
        except FileNotFoundError:
            return False
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
            except BlockingIOError:
                return True
            except OSError as exc:
                if exc.errno not in _NO_FLOCK:
                    raise
                record = read_lock(store_path) or {}
                return not StoreLock._stale_without_flock(record)
            fcntl.flock(fd, fcntl.LOCK_UN)
            return False
        finally:
            os.close(fd)

    # ----------------------------------------------------------------------------- helpers
    @staticmethod
    def _read_fd(fd: int) -> dict[str, Any]:
        data = os.pread(fd, 4096, 0)
        if not data:
            return {}
        try:
            record = json.loads(data)
        except (json.JSONDecodeError, UnicodeDecodeError):
            return {}
        return record if isinstance(record, dict) else {}

    @staticmethod
    def _stale_without_flock(record: dict[str, Any]) -> bool:
        """Decide from pid/host alone (no flock available)."""
        if not record or record.get("pid") is None:
            return True
        if record.get("host") != socket.gethostname():
            return False
        return not _pid_alive(int(record["pid"]))

    def _locked_error(self, record: dict[str, Any]) -> StoreLockedError:
        return StoreLockedError(
            f"{self.store_path}: another run is writing this store (pid {record.get('pid')} on "
            f"{record.get('host')}, since {record.get('started')}); wait for it to finish or "
            f"stop it, then run again (if that process is gone, delete {self.path})"
        )


def _flock_exclusive(fd: int) -> bool:
    """Take an exclusive flock: True if taken, False if the file system has no flock.

    Raises BlockingIOError when another process holds it. A reader that peeks with a shared
    lock (``volrecon status``) holds it for microseconds, so a few short retries absorb that.
    """
    for attempt in range(5):
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            if attempt == 4:
                raise
            time.sleep(0.05)
        except OSError as exc:
            if exc.errno not in _NO_FLOCK:
                raise
            return False
        else:
            return True
    return True  # pragma: no cover - the loop always returns or raises
