"""What the store asks the station file per reading: nothing it already knows.

The store appends every row with its id and its link in the session's hash chain, so each
append needs the table's next id and the chain's end. It asks the file once and then counts,
writes each chain's end once per transaction, and forgets what it knew the moment another
connection commits to the file (``PRAGMA data_version``) or a transaction fails.

On a real SQLite file; SQLite's own statement trace (``Connection.set_trace_callback``) shows
the statements run.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_session

from tests.acquire.test_engine import METADATA, deliver, small_plan
from tests.acquire.test_engine_transactions import file_engine

NOTE = EventKind.NOTE
OPERATOR = "operator A"


@contextmanager
def traced(conn: sqlite3.Connection) -> Iterator[list[str]]:
    """Collect the statements SQLite runs on ``conn`` inside the block (one per executemany
    row)."""
    statements: list[str] = []
    conn.set_trace_callback(statements.append)
    try:
        yield statements
    finally:
        conn.set_trace_callback(None)


def _asks(statements: list[str], text: str) -> int:
    return sum(1 for statement in statements if text in statement)


def test_a_reading_asks_the_file_for_no_id_or_chain_end_the_store_already_knows(
    tmp_path: Path,
) -> None:
    engine, clock = file_engine(tmp_path)
    engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.manual_done(actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    deliver(engine, clock, 20.0)  # the first reading: the store learns the ids it appends to
    with traced(engine.store.db.conn) as statements:
        deliver(engine, clock, 20.1)
    assert _asks(statements, "COMMIT") == 1
    assert _asks(statements, "max(id)") == 0  # was one per table appended to
    assert _asks(statements, "FROM chain_heads") == 0  # was one per row appended
    assert _asks(statements, "INTO chain_heads") == 1  # was one per row appended
    assert _asks(statements, "FROM sessions") == 0  # the session is known to exist
    assert verify_session(engine.store, engine.session_id).verified


def _inserts_of_a_thousand_lines(store: Store) -> int:
    """Keep and commit a thousand raw lines in a new session; check every row is recorded, in
    order, and chained; return how many INSERT statements wrote them."""
    session_id = store.create_session({}, {}, "trs398", "6 MV")
    lines = [f"S q=+{number}.0E-09 C OK\n".encode() for number in range(1000)]
    store.keep_traffic_burst(session_id, 1.0, store.stamp(), "rx", lines)
    with traced(store.db.conn) as statements:
        assert store.commit_traffic() == 1000
    rows = store.traffic(session_id)
    assert [row.line for row in rows] == lines
    assert [row.id for row in rows] == list(range(rows[0].id, rows[0].id + 1000))
    assert verify_session(store, session_id).verified
    # the trace repeats a statement for each trigger it runs: count the distinct ones
    return len({text for text in statements if text.startswith("INSERT INTO traffic")})


def test_a_thousand_kept_raw_lines_go_in_six_statements_every_row_chained(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        # 512 + 256 + 128 + 64 + 32 + 8 rows; was one statement per row
        assert _inserts_of_a_thousand_lines(store) == 6


def test_kept_raw_lines_fit_a_library_taking_999_parameters_a_statement(tmp_path: Path) -> None:
    # SQLite before 3.32 takes at most 999 parameters a statement (sqlite.org/limits.html)
    with Store.open(tmp_path / "station.sqlite") as store:
        store.db.conn.setlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER, 999)
        assert _inserts_of_a_thousand_lines(store) == 9  # 8 x 124 rows (8 values a row), 8


def test_rows_another_connection_commits_are_seen_before_the_next_append(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as daemon, Store.open(path) as other:
        session_id = daemon.create_session({}, {}, "trs398", "6 MV")
        daemon.add_event(session_id, OPERATOR, NOTE, {"text": "first"})
        other.add_event(session_id, "a reviewer's tool", NOTE, {"text": "between"})
        daemon.keep_traffic((session_id, 1.0, daemon.stamp(), "rx", b"20.1\n"))
        last = daemon.add_event(session_id, OPERATOR, NOTE, {"text": "after"})
        events = daemon.events(session_id)
        assert [e.detail().get("text") for e in events][-3:] == ["first", "between", "after"]
        assert events[-1].id == last and len({e.id for e in events}) == len(events)
        assert verify_session(daemon, session_id).verified
        assert daemon.chain_head(session_id) == other.chain_head(session_id)


def test_a_rolled_back_savepoint_leaves_the_ids_and_the_chain_as_they_were(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        session_id = store.create_session({}, {}, "trs398", "6 MV")
        with store.atomic():
            store.add_event(session_id, OPERATOR, NOTE, {"text": "kept"})
            moved = store.chain_head(session_id)
            with pytest.raises(KeyError), store.atomic():  # NotFound: a savepoint rolled back
                store.add_event(session_id, OPERATOR, NOTE, {"text": "rolled back"})
                store.add_event(999, OPERATOR, NOTE, {"text": "no such session"})
            assert store.chain_head(session_id) == moved  # the open transaction's, not the file's
            store.add_event(session_id, OPERATOR, NOTE, {"text": "also kept"})
        texts = [e.detail().get("text") for e in store.events(session_id)]
        assert texts[-2:] == ["kept", "also kept"] and "rolled back" not in texts
        assert verify_session(store, session_id).verified


def test_a_failed_transaction_makes_the_store_ask_the_file_again(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        session_id = store.create_session({}, {}, "trs398", "6 MV")
        with pytest.raises(RuntimeError), store.atomic():
            store.add_event(session_id, OPERATOR, NOTE, {"text": "rolled back"})
            raise RuntimeError("the action failed part-way")
        with traced(store.db.conn) as statements:
            store.add_event(session_id, OPERATOR, NOTE, {"text": "kept"})
        assert _asks(statements, "FROM chain_heads") == 1
        assert [e.detail().get("text") for e in store.events(session_id)][-1] == "kept"
        assert verify_session(store, session_id).verified


def test_a_remembering_store_keeps_its_sets_and_readings_from_its_own_writes(
    tmp_path: Path,
) -> None:
    engine, clock = file_engine(tmp_path)
    engine.store.remember_rows()
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.manual_done(actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    deliver(engine, clock, 20.0)
    engine.store.sets(session_id)  # read once: from now on kept from the store's own writes
    with traced(engine.store.db.conn) as statements:
        for charge in (20.1, 20.2):
            deliver(engine, clock, charge)
        engine.redo("spike on reading 3", actor=OPERATOR)  # a status change and a new set
        engine.arm(actor=OPERATOR)
        deliver(engine, clock, 20.3)
        kept = (
            engine.store.sets(session_id),
            engine.store.readings(session_id),
            engine.store.readings_by_set(session_id),
        )
    assert _asks(statements, "FROM reading_sets") + _asks(statements, "FROM readings") == 2
    with Store.open(tmp_path / "station.sqlite", read_only=True) as reader:
        read = (
            reader.sets(session_id),
            reader.readings(session_id),
            reader.readings_by_set(session_id),
        )
    assert kept == read
    assert [s.status for s in kept[0]] == ["superseded", "collecting"]
    assert len(kept[1]) == 4 and [len(r) for r in kept[2].values()] == [3, 1]


def test_a_remembering_store_reads_the_open_sessions_row_and_air_only_after_writing_them(
    tmp_path: Path,
) -> None:
    engine, clock = file_engine(tmp_path)
    store = engine.store
    store.remember_rows()
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.manual_done(actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    store.sets(session_id)  # the session's rows are remembered from here on
    first = (store.session(session_id), store.environment(session_id))
    with traced(store.db.conn) as statements:
        deliver(engine, clock, 20.0)
        again = [(store.session(session_id), store.environment(session_id)) for _ in range(3)]
    # what a snapshot at every reading read again (was a SELECT of each per snapshot)
    assert _asks(statements, "FROM sessions") == 0
    assert _asks(statements, "FROM environment") == 0
    assert all(read == first for read in again)
    with traced(store.db.conn) as statements:
        engine.set_environment(21.0, 100.9, actor=OPERATOR)  # written: read again, once
        entries = [store.environment(session_id) for _ in range(3)]
        engine.stop("enough for this test", actor=OPERATOR)  # the row's status changes
        row = store.session(session_id)
    assert _asks(statements, "FROM environment") == 1
    assert [entry.temperature_C for entry in entries[-1]] == [20.0, 21.0]
    with Store.open(tmp_path / "station.sqlite", read_only=True) as reader:
        assert reader.environment(session_id) == entries[-1]
        assert reader.session(session_id) == row
    assert row.status == "finished"
