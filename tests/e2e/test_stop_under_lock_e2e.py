"""End to end: the daemon stopped (SIGTERM) while another program holds the database's write
lock loses no raw line.

It used to exit 0 with the lines it held in memory gone. Now it sets them aside in a file beside
the station database, says how many and where, and exits with EXIT_LINES_SET_ASIDE; its next
start records every one of them (chained, with an event saying so) and renames the file, and the
session still replays exactly (no reading came from those lines). A side file that cannot be
read is refused in words naming the file and the line, and left in place.
Real processes: the simulated electrometer on a pty, the daemon, another process holding
SQLite's write lock (as in ``tests/faults/store_faults.py``).
"""

from __future__ import annotations

import asyncio
import json
import re
import signal
import subprocess
from pathlib import Path

import pytest
from chargebook.acquire.daemon.daemon import STOPPED_LINES_SET_ASIDE
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_LINES_SET_ASIDE
from chargebook.acquire.processes import chargebook_args
from chargebook.acquire.protocol import Method
from chargebook.acquire.record import unrecorded
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.health import LOCKED
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_all
from chargebook.acquire.reports import sections
from chargebook.acquire.reports.data import load_record

from tests.bench.harness import QUIET_STREAM, collecting_daemon, last_traffic_id, read_db, station
from tests.faults.sessions import until
from tests.faults.store_faults import Watch, other_writer

pytestmark = [pytest.mark.e2e, pytest.mark.slow]

#: Lines the simulator pushes while the lock is held (at 200 lines/s).
FLOOD_LINES = 300


def _held(message: str | None) -> int:
    """Return how many raw lines the record condition says are held (0 when it says none)."""
    found = re.search(r"\(([\d,]+) raw lines? held in memory", message or "")
    return int(found.group(1).replace(",", "")) if found else 0


def _chargebook(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        chargebook_args(*args), capture_output=True, text=True, timeout=60, check=False
    )


def _rows_after(db: Path, first_id: int) -> list[tuple]:
    sql = "SELECT session_id, t_s, recorded_at, direction, line FROM traffic WHERE id > ?"
    return read_db(db, sql, (first_id,))


async def test_sigterm_under_a_held_lock_sets_every_line_aside_and_the_next_start_records_them():
    with station("stop-under-lock", "push-exponent", *QUIET_STREAM) as world:
        client = await collecting_daemon(world)
        watch = Watch()
        client.add_listener(watch)
        await client.subscribe()
        first_id = last_traffic_id(world.db)
        holder = await asyncio.to_thread(other_writer, world.db, 300.0, "hold")
        try:
            with world.bench() as bench:
                flood = await asyncio.to_thread(bench.flood, 200, FLOOD_LINES, wait=True)
            written = int(flood["written"])
            await until(lambda: _held(watch.message) >= written, "every line to be held", 60)
            await client.close()
            assert world.daemon is not None
            process = world.daemon.process
            process.send_signal(signal.SIGTERM)
            status = await asyncio.to_thread(process.wait, 60)
            # nothing could be committed while the lock was held: every line is in the file
            assert _rows_after(world.db, first_id) == []
            (side_file,) = unrecorded.side_files(world.db)
        finally:
            holder.kill()
            holder.wait()
        assert status == EXIT_LINES_SET_ASIDE
        set_aside = unrecorded.read_set_aside(side_file).lines
        received = [line for line in set_aside if line[3] == "rx"]
        assert len(received) >= written == FLOOD_LINES
        logs = world.daemon_logs()
        assert f"{len(set_aside):,} raw lines exchanged with the electrometer" in logs
        assert f"set aside in {side_file}" in logs

        verify = _chargebook("verify", "--db", str(world.db))
        assert verify.returncode == 0, verify.stdout
        assert (
            f"RAW LINES NOT YET RECORDED: {side_file} holds {len(set_aside):,} raw lines read "
            "before a daemon's stop"
        ) in verify.stdout

        world.restart_daemon()  # the lock is free now: the side file is recorded at the start
        recorded = _rows_after(world.db, first_id)
        assert [row for row in recorded if row in set(set_aside)] == list(set_aside)
        assert not side_file.exists()
        assert side_file.with_name(side_file.name + unrecorded.RECOVERED_SUFFIX).exists()
        client = await world.connect()
        await client.call(Method.SESSION_ABORT, reason="the stop test is over", confirm=True)
        await client.close()
        world.stop_daemon()
        with Store.open(world.db, read_only=True) as store:
            events = store.events_of_kind(EventKind.UNRECORDED_LINES_RECOVERED)
            (session_id,) = events
            (event,) = events[session_id]
            detail = event.detail()
            assert detail["lines"] == detail["file_lines"] == len(set_aside)
            assert detail["file"] == side_file.name
            assert "no reading was derived from them" in detail["note"]
            assert (detail["stopped_by"], detail["cause"]) == ("SIGTERM", LOCKED)
            restarted = store.last_event_of([EventKind.DAEMON_RESTARTED])
            assert restarted is not None and restarted.id > event.id
            assert restarted.detail()["previous_run"] == STOPPED_LINES_SET_ASIDE
            assert restarted.detail()["previous_stop"] == "SIGTERM"
            assert all(report.verified for report in verify_all(store))
            said = sections.audit(load_record(store, session_id)).rows
            assert (
                "raw lines recovered",
                f"{len(set_aside)} raw lines read before the daemon's last stop, while the record "
                f"could not commit, recorded at the next start from {side_file.name}; no reading "
                "was derived from them",
            ) in [row[2:] for row in said]
            ids = {
                row.id for row in store.traffic(session_id) if row.recorded_at >= set_aside[0][2]
            }
            readings = store.readings(session_id)
        assert not [reading for reading in readings if reading.traffic_id in ids]
        # the recovered lines change nothing the engine did: the session replays exactly
        replay = _chargebook("replay", str(session_id), "--db", str(world.db))
        assert replay.returncode == 0, replay.stdout + replay.stderr
        assert "exact reproduction" in replay.stdout


def test_a_malformed_side_file_is_refused_naming_the_file_and_line_and_left_in_place(
    tmp_path: Path,
) -> None:
    db = tmp_path / "station.sqlite"
    with Store.open(db) as store:
        session_id = store.create_session({}, {"steps": []}, "trs398", "6 MV")
    line = (session_id, 1.5, "2026-12-03T21:00:00.000001+00:00", "rx", b"+1.0E-09\r\n")
    side_file = _set_aside_for(db, [line, line])
    text = side_file.read_text().splitlines()
    text[2] = text[2].replace('"rx"', '"sideways"')
    side_file.write_text("\n".join(text) + "\n")
    done = _chargebook(
        "serve",
        *("--profile", "push-exponent", "--port", str(tmp_path / "no-port")),
        *("--db", str(db), "--socket", str(tmp_path / "run" / "d.sock")),
    )
    assert done.returncode == EXIT_INVALID_INPUT
    assert f"{side_file} line 3: direction 'sideways' is not one of tx, rx" in done.stderr
    assert side_file.exists()
    with Store.open(db, read_only=True) as store:
        assert store.traffic(session_id) == []


def test_a_side_file_recorded_before_its_rename_is_not_recorded_twice(tmp_path: Path) -> None:
    db = tmp_path / "station.sqlite"
    session_id, lines = _one_session_station(db)
    side_file = _set_aside_for(db, lines)
    kept = side_file.read_bytes()
    with Store.open(db) as store:
        assert unrecorded.recover(store, side_file)[0] == 3
        side_file.write_bytes(kept)  # as if the power went between the commit and the rename
        assert unrecorded.recover(store, side_file)[0] == 0
        assert len(store.traffic(session_id)) == 3
        assert unrecorded.side_files(db) == []


def _one_session_station(db: Path) -> tuple[int, list]:
    """Make a station file with one session; return its id and three raw lines of it."""
    with Store.open(db) as store:
        session_id = store.create_session({}, {"steps": []}, "trs398", "6 MV")
    lines = [(session_id, float(n), f"2026-12-03T21:00:0{n}+00:00", "rx", b"x") for n in range(3)]
    return session_id, lines


def _set_aside_for(db: Path, lines: list) -> Path:
    """Set ``lines`` aside as the daemon does, with the station's and sessions' uuids."""
    with Store.open(db, read_only=True) as store:
        station = store.station().uuid
        uuids = {row.id: row.uuid for row in store.sessions_of({line[0] for line in lines})}
    return unrecorded.set_aside(
        db, lines, reason="SIGTERM", cause="test", station_uuid=station, session_uuids=uuids
    )


def test_a_database_whose_name_holds_glob_characters_finds_its_side_files(tmp_path: Path) -> None:
    # A review found room[1].sqlite's side files never recorded: "[1]" was read as a pattern.
    db = tmp_path / "room[1].sqlite"
    session_id, lines = _one_session_station(db)
    side_file = _set_aside_for(db, lines)
    assert unrecorded.side_files(db) == [side_file]
    with Store.open(db) as store:
        assert unrecorded.recover(store, side_file)[0] == 3
        assert len(store.traffic(session_id)) == 3


def test_a_side_file_beside_another_stations_database_is_refused(tmp_path: Path) -> None:
    first, second = tmp_path / "a" / "station.sqlite", tmp_path / "b" / "station.sqlite"
    first.parent.mkdir()
    second.parent.mkdir()
    _session_id, lines = _one_session_station(first)
    _one_session_station(second)
    side_file = _set_aside_for(first, lines)
    moved = second.parent / side_file.name
    side_file.rename(moved)  # copied between station folders: both files are station.sqlite
    with Store.open(second) as store, pytest.raises(unrecorded.UnrecordedFileError) as refused:
        unrecorded.recover(store, moved)
    assert f"{moved} line 1: its lines were read for station" in str(refused.value)
    assert "put the file beside that station's database" in str(refused.value)
    assert moved.exists()
    with Store.open(second, read_only=True) as store:
        assert store.traffic(1) == []


def test_a_side_file_whose_line_bytes_were_changed_is_refused(tmp_path: Path) -> None:
    db = tmp_path / "station.sqlite"
    session_id, lines = _one_session_station(db)
    side_file = _set_aside_for(db, lines)
    text = side_file.read_text()
    side_file.write_text(text.replace('"line_b64": "eA=="', '"line_b64": "eQ=="', 1))  # x -> y
    with Store.open(db) as store, pytest.raises(unrecorded.UnrecordedFileError) as refused:
        unrecorded.recover(store, side_file)
    assert "line 1: the lines are not those the daemon wrote" in str(refused.value)
    with Store.open(db, read_only=True) as store:
        assert store.traffic(session_id) == []


def test_lines_of_a_session_a_restored_database_holds_under_another_uuid_are_refused(
    tmp_path: Path,
) -> None:
    db, other = tmp_path / "station.sqlite", tmp_path / "other" / "station.sqlite"
    other.parent.mkdir()
    _session_id, lines = _one_session_station(db)
    _one_session_station(other)  # its session 1 is another session
    side_file = _set_aside_for(db, lines)
    with Store.open(db, read_only=True) as store:
        station = store.station().uuid
    with Store.open(other) as store:
        header = side_file.read_text().splitlines()
        theirs = store.station().uuid
    side_file.write_text("\n".join([header[0].replace(station, theirs), *header[1:]]) + "\n")
    moved = other.parent / side_file.name
    side_file.rename(moved)
    with Store.open(other) as store, pytest.raises(unrecorded.UnrecordedFileError) as refused:
        unrecorded.recover(store, moved)
    assert "line 2: session 1 of this database is not the session the line was read in" in str(
        refused.value
    )


def test_a_start_while_another_program_holds_the_write_lock_is_refused_in_words(
    tmp_path: Path,
) -> None:
    # It ended in a raw "sqlite3.OperationalError: database is locked" traceback.
    db = tmp_path / "station.sqlite"
    _one_session_station(db)
    holder = other_writer(db, 30.0, "hold")
    try:
        done = _chargebook(
            "serve",
            *("--profile", "push-exponent", "--port", str(tmp_path / "no-port")),
            *("--db", str(db), "--socket", str(tmp_path / "run" / "d.sock")),
        )
    finally:
        holder.kill()
        holder.wait()
    assert done.returncode == EXIT_INVALID_INPUT
    assert "Traceback" not in done.stderr
    assert f"the station database {db} could not be written as the daemon started" in done.stderr
    assert LOCKED in done.stderr


def _edit_header(side_file: Path, **changes: object) -> None:
    """Change the header of a side file (its lines, and so their SHA-256, untouched)."""
    header, *lines = side_file.read_text().splitlines()
    fields = json.loads(header)
    fields.update(changes)
    side_file.write_text("\n".join([json.dumps(fields), *lines]) + "\n")


@pytest.mark.parametrize(
    ("changes", "words"),
    [
        ({"station_uuid": None}, "line 1: the header does not name its station's uuid"),
        ({"session_uuids": {"²": "x"}}, "line 1: session_uuids is not a map of session ids"),
        ({"session_uuids": {"7": "x"}}, "line 2: session 1 is not named in the header"),
    ],
)
def test_a_side_file_whose_header_does_not_name_whose_lines_they_are_is_refused(
    tmp_path: Path, changes: dict, words: str
) -> None:
    # A second review dropped the station's uuid (or the session's) from a header and had the
    # lines recorded into another station's session; "²" passed isdigit() and crashed int().
    db = tmp_path / "station.sqlite"
    session_id, lines = _one_session_station(db)
    side_file = _set_aside_for(db, lines)
    _edit_header(side_file, **changes)
    with Store.open(db) as store:
        assert words in unrecorded.waiting(store, db)[0]  # verify says it, without a traceback
        with pytest.raises(unrecorded.UnrecordedFileError, match=words):
            unrecorded.recover(store, side_file)
        assert store.traffic(session_id) == []


def test_lines_for_a_closed_session_or_with_a_time_that_is_not_one_are_refused(
    tmp_path: Path,
) -> None:
    # A daemon sets aside only an open session's lines (it closes none while they are held).
    db = tmp_path / "station.sqlite"
    session_id, lines = _one_session_station(db)
    side_file = _set_aside_for(db, lines)
    with Store.open(db) as store:
        store.set_session_status(session_id, "finished")
        with pytest.raises(unrecorded.UnrecordedFileError, match="session 1 is finished"):
            unrecorded.recover(store, side_file)
    side_file.unlink()
    banana = [(session_id, 1.0, "banana", "rx", b"x")]
    with pytest.raises(unrecorded.UnrecordedFileError, match="recorded_at is not a UTC time"):
        unrecorded.read_set_aside(_set_aside_for(db, banana))
