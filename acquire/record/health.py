"""Whether the station database can take a commit: the causes of a failed commit, in words,
and a check that the daemon's files are still the files it opened.

A store that cannot commit (the disk is full, another program holds the write lock longer than
the busy timeout, an I/O error, the ``-wal`` file deleted) puts the session in one named
condition, "record not writable: <cause>", until the cause is cleared (see
``chargebook.acquire.daemon.daemon``).
"""

from __future__ import annotations

import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path

#: The words that open every message of the condition.
NOT_WRITABLE = "record not writable"
#: How the cause is said when another program holds the database's write lock.
LOCKED = "another program holds the database's write lock"
#: SQLite's own words for the causes an operator can clear, and how we say them.
_CAUSES = (
    ("database or disk is full", "the disk is full"),
    ("database is locked", LOCKED),
    ("disk i/o error", "a disk I/O error"),
    ("readonly database", "the database file is read-only"),
)


def commit_failure(error: BaseException) -> str | None:
    """Return why the store could not commit, in words, if ``error`` says so; else None.

    A row the store refused (a constraint, a bad value) is not a failure to commit: None.
    """
    if isinstance(error, sqlite3.IntegrityError | sqlite3.ProgrammingError):
        return None
    if not isinstance(error, sqlite3.OperationalError | sqlite3.DatabaseError | OSError):
        return None
    text = str(error)
    for sqlite_words, ours in _CAUSES:
        if sqlite_words in text.lower():
            return ours
    return text or type(error).__name__


def not_writable(cause: str) -> str:
    """Return the condition's message for ``cause``."""
    return f"{NOT_WRITABLE}: {cause}"


@dataclass(frozen=True)
class RecordFiles:
    """The database file and its ``-wal`` file as the daemon opened them (device, inode)."""

    db_path: Path
    db_inode: tuple[int, int] | None
    wal_inode: tuple[int, int] | None

    @classmethod
    def taken_now(cls, db_path: Path) -> RecordFiles:
        """Return the files' identities now (call it once the store is open in WAL mode)."""
        return cls(db_path, _inode(db_path), _inode(_wal(db_path)))

    def check(self) -> str | None:
        """Return what happened to the files, in words, or None while they are the ones opened.

        Deleting the ``-wal`` file while the daemon runs loses every commit since the last
        checkpoint when the daemon stops; replacing the database file sends the record to a
        file nobody will read.
        """
        if self.db_inode is not None and _inode(self.db_path) != self.db_inode:
            return f"the database file {self.db_path} was deleted or replaced"
        if self.wal_inode is not None and _inode(_wal(self.db_path)) != self.wal_inode:
            return f"the -wal file {_wal(self.db_path)} was deleted or replaced"
        return None


def _wal(db_path: Path) -> Path:
    return db_path.with_name(db_path.name + "-wal")


def _inode(path: Path) -> tuple[int, int] | None:
    try:
        status = os.stat(path)
    except FileNotFoundError:
        return None
    return status.st_dev, status.st_ino
