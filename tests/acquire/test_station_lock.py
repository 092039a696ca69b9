"""The station lock: one holder at a time, the second refused naming the first's pid."""

from __future__ import annotations

import os

import pytest
from chargebook.acquire.record.station_lock import StationInUse, StationLock, lock_path_for


def test_a_second_lock_on_the_same_file_is_refused_naming_the_holder(tmp_path):
    db = tmp_path / "station.sqlite"
    with StationLock(db), pytest.raises(StationInUse) as refused:
        StationLock(db).acquire()
    assert f"pid {os.getpid()}" in str(refused.value)
    assert str(db) in str(refused.value)


def test_the_lock_is_free_again_once_released(tmp_path):
    db = tmp_path / "station.sqlite"
    first = StationLock(db)
    first.acquire()
    first.release()
    with StationLock(db) as second:
        assert second.path == lock_path_for(db)
    assert not db.exists()  # taking the lock writes nothing to the database itself


def test_locks_on_two_files_are_independent(tmp_path):
    with StationLock(tmp_path / "a.sqlite"), StationLock(tmp_path / "b.sqlite"):
        pass
