"""One daemon per station file: an exclusive lock taken before anything is written to it.

The lock is a BSD ``flock`` on a small file beside the database (``station.sqlite.lock``), held
for the daemon's whole life and released by the kernel when the process ends, however it ends:
a daemon killed with SIGKILL never leaves a stale lock behind. The file holds the holder's pid,
so a second daemon is refused in words that name it.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path


class StationInUse(Exception):
    """Another daemon holds the station database (the message names its pid)."""


def lock_path_for(db_path: Path) -> Path:
    """Return the lock file that guards ``db_path`` (the database path with ``.lock`` added)."""
    return db_path.with_name(db_path.name + ".lock")


class StationLock:
    """An exclusive, non-blocking lock on one station database, held until :meth:`release`."""

    def __init__(self, db_path: Path) -> None:
        self.db_path = db_path
        self.path = lock_path_for(db_path)
        self._fd: int | None = None

    def acquire(self) -> None:
        """Take the lock or raise :class:`StationInUse` naming the holder's pid.

        Creates the database's folder if needed (as opening the database would). Raises
        OSError when the lock file cannot be created (an unwritable folder).
        """
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_pid(fd)
            os.close(fd)
            who = f"pid {holder}" if holder else "a process whose pid is not recorded"
            raise StationInUse(
                f"the station database {self.db_path} is in use by another chargebook daemon "
                f"({who}); stop that daemon first, or give this one its own --db FILE"
            ) from None
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        self._fd = fd

    def release(self) -> None:
        """Release the lock (the lock file stays; it holds no state of its own)."""
        fd, self._fd = self._fd, None
        if fd is not None:
            os.close(fd)

    def __enter__(self) -> StationLock:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def _read_pid(fd: int) -> int | None:
    try:
        text = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
        return int(text) if text else None
    except (OSError, ValueError):
        return None
