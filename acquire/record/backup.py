"""A consistent copy of a station file, safe to take while the daemon measures.

SQLite's online backup API (``sqlite3.Connection.backup``, in one step) copies the database as
one read transaction sees it: every transaction committed before the copy began, none after,
whatever the daemon writes meanwhile. Copying the file with ``cp`` instead misses what is still
in the ``-wal`` file, or takes the two at different moments.

The copy is written to a hidden file beside the destination, switched to a single file
(rollback journal; a daemon started on it switches it back to WAL), checked (SQLite's quick
integrity check, then every session's hash chain, as ``chargebook verify``), flushed to disk,
and only then renamed into place: an interrupted backup leaves no half-written file under the
destination's name.
"""

from __future__ import annotations

import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path

from chargebook.acquire.record.migrations import SCHEMA_VERSION
from chargebook.acquire.record.store import Store, StoreError
from chargebook.acquire.record.verify import file_damage, verify_all
from chargebook.corrections.errors import InputError


@dataclass(frozen=True, slots=True)
class BackupResult:
    """What was copied and what the check of the copy found (empty ``problems``: verified)."""

    path: Path
    sessions: int
    chains_checked: int
    problems: tuple[str, ...]

    @property
    def verified(self) -> bool:
        """Return True when the copy passed the integrity check and every chain verifies."""
        return not self.problems


def backup_station(source: Path, out: Path, *, force: bool = False) -> BackupResult:
    """Copy the station file ``source`` to ``out`` consistently and check the copy.

    Raises :class:`InputError` for a missing source or an existing ``out`` without ``force``,
    and :class:`StoreError` when the source cannot be read or the copy fails SQLite's integrity
    check (nothing is left at ``out`` then). A copy whose hash chains do not verify is kept (it
    is as faithful as the source) and its problems are returned: the source does not verify
    either (``chargebook verify`` on it says where).
    """
    source = source.expanduser()
    out = out.expanduser()
    if not source.is_file():
        raise InputError("--db", str(source), "an existing station file", "does not exist")
    if out.exists() and not force:
        raise InputError("OUT", str(out), "a new file name, or --force to replace it", "exists")
    if out.resolve() == source.resolve():
        raise InputError("OUT", str(out), "another file than the station file", "is the source")
    if not out.parent.is_dir():
        raise StoreError(f"cannot write the backup {out}: the folder {out.parent} does not exist")
    partial = out.with_name(f".{out.name}.partial")
    _remove(partial)
    try:
        _copy(source, partial)
        result = _check(partial, out)
        _flush(partial)
        partial.replace(out)
        _flush(out.parent)
    except BaseException:
        _remove(partial)
        raise
    return result


def _copy(source: Path, target: Path) -> None:
    """Copy ``source`` into the new file ``target`` with the online backup API, in one step."""
    try:
        reader = sqlite3.connect(f"{source.resolve().as_uri()}?mode=ro", uri=True)
    except sqlite3.Error as error:
        raise StoreError(f"{source} cannot be opened: {error}") from None
    try:
        writer = sqlite3.connect(target)
        try:
            reader.backup(writer)  # pages=-1: the whole file in one read transaction
            writer.execute("PRAGMA journal_mode = DELETE")  # one self-contained file
        finally:
            writer.close()
    except sqlite3.Error as error:
        raise StoreError(f"{source} could not be copied: {error}") from None
    finally:
        reader.close()


def _check(copy: Path, out: Path) -> BackupResult:
    """Return the check of the copy: integrity, then every hash chain (current schema)."""
    with sqlite3.connect(f"{copy.resolve().as_uri()}?mode=ro", uri=True) as conn:
        found = [str(row[0]) for row in conn.execute("PRAGMA quick_check(20)")]
        version = int(conn.execute("PRAGMA user_version").fetchone()[0])
    conn.close()
    if found != ["ok"]:
        raise StoreError(f"the copy fails SQLite's quick integrity check: {'; '.join(found)}")
    if version != SCHEMA_VERSION:
        note = (
            f"schema version {version} (this chargebook reads {SCHEMA_VERSION}): the hash "
            "chains were not checked; start the daemon on the station once to migrate it"
        )
        return BackupResult(out, 0, 0, (note,))
    with Store.open(copy, read_only=True) as store:
        reports = verify_all(store)
        problems = [*file_damage(store)]
        problems += [report.summary() for report in reports if not report.verified]
        sessions = len(store.sessions())
    return BackupResult(out, sessions, len(reports), tuple(problems))


def _flush(path: Path) -> None:
    """Flush a file or a folder's entries to disk (fsync)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _remove(path: Path) -> None:
    for leftover in (path, path.with_name(path.name + "-journal")):
        leftover.unlink(missing_ok=True)
