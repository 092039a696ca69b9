"""The daemon's record condition, in words: what the operator is told while raw lines wait in
memory for a record that cannot commit (the real daemon under these faults is in
``tests/faults/store_faults.py`` and ``tests/e2e/test_record_files_e2e.py``)."""

from __future__ import annotations

from pathlib import Path

from chargebook.acquire.daemon.daemon import MAX_HELD_LINES, Daemon, DaemonOptions
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.store import Store


def test_the_operator_is_told_how_many_lines_are_held_and_when_the_bound_nears(tmp_path: Path):
    daemon = Daemon(
        DaemonOptions("query-plain", tmp_path / "s.sqlite", tmp_path / "run" / "d.sock")
    )
    daemon.engine = Engine(Store.memory())
    daemon._lines_not_writable("the disk is full", 1_000)
    assert daemon.engine.record_fault == (
        "record not writable: the disk is full (1,000 raw lines held in memory)"
    )
    assert daemon.engine.snapshot()["allowed"] == []
    daemon._lines_not_writable("the disk is full", int(0.85 * MAX_HELD_LINES))
    assert f"at {MAX_HELD_LINES:,} the electrometer is no longer read" in (
        daemon.engine.record_fault
    )
    daemon._lines_not_writable(None, 0)
    assert daemon.engine.record_fault is None
    assert "session.start" in daemon.engine.snapshot()["allowed"]
