"""What the daemon says at a stop with raw lines the record could not commit: set aside in a
file beside the database (how many, where), or, when that file cannot be written either, lost,
in words (the real daemon under a held write lock is in
``tests/e2e/test_stop_under_lock_e2e.py``)."""

from __future__ import annotations

import time
from pathlib import Path

from chargebook.acquire.daemon.committer import RETRY_S, Committer
from chargebook.acquire.daemon.daemon import Daemon, DaemonOptions
from chargebook.acquire.record import unrecorded
from chargebook.acquire.record.health import LOCKED
from chargebook.acquire.record.store import Store

LINE = (None, 2.5, "2026-12-03T21:00:00.000001+00:00", "rx", b"+1.234E-09,0\r\n")


def _stopping_daemon(db: Path) -> Daemon:
    """Return a daemon on ``db`` whose store keeps two raw lines it could not commit."""
    daemon = Daemon(DaemonOptions("push-exponent", db, db.parent / "run" / "d.sock"))
    daemon.store = Store.memory()
    daemon.store.keep_traffic(LINE)
    daemon.store.keep_traffic(LINE)
    daemon._lines_fault = LOCKED
    return daemon


def test_held_lines_are_set_aside_beside_the_database_and_said_with_their_count(tmp_path: Path):
    daemon = _stopping_daemon(tmp_path / "station.sqlite")
    daemon._set_aside_held_lines()
    (side_file,) = unrecorded.side_files(tmp_path / "station.sqlite")
    assert daemon.set_aside_in == side_file
    assert unrecorded.read_set_aside(side_file).lines == (LINE, LINE)
    assert daemon.stop_problem == (
        f"2 raw lines exchanged with the electrometer could not be recorded at the stop "
        f"({LOCKED}); they are set aside in {side_file}, and the next daemon start on "
        f"{tmp_path / 'station.sqlite'} records them"
    )
    assert daemon.store is not None and daemon.store.kept_traffic_count() == 0


def test_lines_that_cannot_be_set_aside_either_are_said_lost_with_why(tmp_path: Path):
    daemon = _stopping_daemon(tmp_path / "gone" / "station.sqlite")  # no such folder
    daemon._set_aside_held_lines()
    assert daemon.set_aside_in is None
    assert daemon.stop_problem is not None
    assert daemon.stop_problem.startswith(
        f"2 raw lines exchanged with the electrometer could not be recorded ({LOCKED}) nor written "
        "beside the database ([Errno 2] No such file or directory"
    )
    assert daemon.stop_problem.endswith("they are lost")


def test_a_stop_with_nothing_held_sets_nothing_aside(tmp_path: Path):
    daemon = Daemon(DaemonOptions("push-exponent", tmp_path / "s.sqlite", tmp_path / "d.sock"))
    daemon.store = Store.memory()
    daemon._set_aside_held_lines()
    assert daemon.stop_problem is None and unrecorded.side_files(tmp_path / "s.sqlite") == []


def test_the_committer_tries_a_failing_commit_again_at_the_stop_until_it_commits():
    outcomes = [False, False, True]  # the lock is held for two tries, then let go
    posted: list[str] = []
    committer = Committer(
        lambda: outcomes.pop(0) if outcomes else True, lambda k, p: posted.append(k)
    )
    committer.start()
    committer.hand_over("samples", None)
    committer.stop(timeout_s=30.0)
    assert outcomes == [] and posted == ["samples"]


def test_the_committer_stops_once_its_wait_is_over_with_the_commit_still_failing():
    tries: list[float] = []

    def locked() -> bool:
        tries.append(time.monotonic())
        return False

    committer = Committer(locked, lambda k, p: None)
    committer.start()
    committer.hand_over("samples", None)
    committer.stop(timeout_s=2 * RETRY_S)
    assert committer._thread is not None and not committer._thread.is_alive()
    assert committer.holding() and len(tries) >= 2  # tried again, then gave up, post held
