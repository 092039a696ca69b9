"""The station store: schema and migrations, append-only record, durability and resume.

Real SQLite throughout: in-memory databases for the API, real files (and a real second process
that dies without closing) for WAL, durability and resume.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import textwrap
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from chargebook.acquire.record.events import EventKind, InstrumentIdentified
from chargebook.acquire.record.migrations import MIGRATIONS, SCHEMA_VERSION, migrate, schema_version
from chargebook.acquire.record.store import (
    NotFound,
    Store,
    StoreError,
    default_db_path,
    utc_stamp_now,
)
from chargebook.corrections.errors import InputError
from hypothesis import given, settings
from hypothesis import strategies as st
from sqlite_utils import Database

# Invented demo scenario (our own clinic), not reference data.
METADATA = {"treatment_machine": "DEMO-LA1", "beam": "6 MV", "chamber_serial": "SIM-CH-0001"}
NAN = float("nan")
PLAN = {"name": "default", "steps": [{"key": "routine", "purpose": "routine"}]}


class TickingClock:
    """A clock that advances one second per call, so recorded times are distinct and known."""

    def __init__(self) -> None:
        self.t = datetime(2025, 3, 4, 8, 0, 0, tzinfo=UTC)

    def __call__(self) -> datetime:
        self.t += timedelta(seconds=1)
        return self.t


@pytest.fixture
def store() -> Store:
    s = Store.memory(now=TickingClock())
    yield s
    s.close()


#: An instrument's identification, as the engine records it.
IDENTIFIED = InstrumentIdentified(
    identity="Bench, SIM-MODEL-1, SIM-EM-0001, 1.4", profile="scpi-generic"
)


def _session_with_set(store: Store) -> tuple[int, int]:
    session_id = store.create_session(METADATA, PLAN, "trs398", "6 MV")
    set_id = store.add_set(session_id, 2, "routine", "routine", 1, 300.0, 1)
    return session_id, set_id


def _reading(store: Store, session_id: int, set_id: int, seq: int, charge_nC: float) -> int:
    return store.add_reading(session_id, set_id, seq, 10.0 + seq, charge_nC, "auto", False, "ok")


# ------------------------------------------------------------------------ schema, migrations


def test_new_database_is_at_the_latest_version_with_each_migration_recorded(store: Store) -> None:
    assert store.schema_version == SCHEMA_VERSION == len(MIGRATIONS)
    rows = list(store.db.query("SELECT version, name FROM migrations ORDER BY version"))
    assert [(r["version"], r["name"]) for r in rows] == [
        (i + 1, m.name) for i, m in enumerate(MIGRATIONS)
    ]


def test_an_old_file_is_migrated_forward_keeping_its_rows(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    old = Database(path)
    assert migrate(old, upto=1) == [MIGRATIONS[0].name]
    old.execute(
        "INSERT INTO sessions (created_at, status, metadata_json, plan_json, convention, beam)"
        " VALUES ('2024-01-01T00:00:00+00:00', 'open', '{}', '{}', 'tg51', '10 MV')"
    )
    old.close()

    with Store.open(path) as store:
        assert store.schema_version == SCHEMA_VERSION
        assert store.session(1).beam == "10 MV"
        indexes = {r["name"] for r in store.db.query("SELECT name FROM sqlite_master")}
        assert "readings_by_session" in indexes


def test_a_failing_migration_leaves_the_previous_version_whole(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    db = Database(path)
    migrate(db, upto=1)
    # A hand-made object with the name migration 2 wants makes migration 2 fail midway.
    db.execute("CREATE TABLE sessions_by_status (x)")
    with pytest.raises(sqlite3.OperationalError, match="sessions_by_status"):
        migrate(db)
    assert schema_version(db) == 1
    names = [r["name"] for r in db.query("SELECT name FROM migrations")]
    assert names == [MIGRATIONS[0].name]
    created = {r["name"] for r in db.query("SELECT name FROM sqlite_master")}
    assert "reading_sets_by_session" not in created  # the first statement was rolled back
    db.close()


def test_a_database_from_a_newer_chargebook_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    Store.open(path).close()
    raw = sqlite3.connect(path)
    raw.execute("PRAGMA user_version = 99")
    raw.close()
    with pytest.raises(StoreError, match=rf"schema version 99.*up to {SCHEMA_VERSION}"):
        Store.open(path)
    with pytest.raises(StoreError, match=r"newer chargebook.*install the newer") as refused:
        Store.open(path, read_only=True)  # the reading commands: no advice the daemon refuses
    assert "migrate" not in str(refused.value)


def test_a_file_that_is_not_a_database_is_refused_by_path(tmp_path: Path) -> None:
    path = tmp_path / "notes.sqlite"
    path.write_bytes(b"these are my notes, not a database" * 100)
    with pytest.raises(StoreError, match=r"notes\.sqlite"):
        Store.open(path)
    assert path.read_bytes().startswith(b"these are my notes")


def test_file_store_uses_wal_and_full_sync(tmp_path: Path) -> None:
    with Store.open(tmp_path / "a" / "b" / "station.sqlite") as store:
        assert store.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        # SQLite documentation, PRAGMA synchronous: FULL is 2.
        assert store.db.execute("PRAGMA synchronous").fetchone()[0] == 2
        assert store.db.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        # SQLite documentation, PRAGMA temp_store: MEMORY is 2 (a savepoint's undo pages).
        assert store.db.execute("PRAGMA temp_store").fetchone()[0] == 2


def test_read_only_open_needs_an_existing_file_and_cannot_write(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with pytest.raises(StoreError, match=r"no station database at .*station\.sqlite"):
        Store.open(path, read_only=True)
    assert not path.exists()
    with Store.open(path) as writer:
        session_id = writer.create_session(METADATA, PLAN, "trs398", "6 MV")
        with Store.open(path, read_only=True) as reader:
            assert reader.session(session_id).beam == "6 MV"
            with pytest.raises(sqlite3.OperationalError, match="readonly"):
                reader.add_event(session_id, "someone", EventKind.NOTE, {"text": "read only"})
        assert len(writer.events(session_id)) == 1


def test_read_only_open_refuses_an_unmigrated_file(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    db = Database(path)
    migrate(db, upto=1)
    db.close()
    with pytest.raises(StoreError, match="schema version 1"):
        Store.open(path, read_only=True)


def test_default_path_follows_xdg_data_home(monkeypatch, tmp_path: Path) -> None:
    # XDG Base Directory Specification: $XDG_DATA_HOME, else $HOME/.local/share;
    # a relative XDG_DATA_HOME is invalid and ignored.
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path))
    assert default_db_path() == tmp_path / "chargebook" / "station.sqlite"
    monkeypatch.setenv("XDG_DATA_HOME", "relative/dir")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert default_db_path() == tmp_path / "home" / ".local/share/chargebook/station.sqlite"
    monkeypatch.delenv("XDG_DATA_HOME")
    assert default_db_path() == tmp_path / "home" / ".local/share/chargebook/station.sqlite"


# --------------------------------------------------------------------------- the record


def test_rows_read_back_as_written(store: Store) -> None:
    session_id, set_id = _session_with_set(store)
    traffic_id = store.add_traffic(session_id, 12.5, "rx", b"Q=+20.512E-9 C\r\n")
    reading_id = store.add_reading(
        session_id, set_id, 0, 12.5, 20.512, "pushed", True, "ok", traffic_id
    )
    env_id = store.add_environment(session_id, 21.3, 101.2, 1012.0, "hPa", 45.0, "operator")
    note = {"text": "chamber swapped"}
    event_id = store.add_event(session_id, "operator F", EventKind.NOTE, note)

    session = store.session(session_id)
    assert (session.status, session.convention, session.beam) == ("open", "trs398", "6 MV")
    assert session.metadata() == METADATA and session.plan() == PLAN
    assert session.created_at == "2025-03-04T08:00:01.000000+00:00"

    (reading_set,) = store.sets(session_id)
    assert (reading_set.step_index, reading_set.step_key, reading_set.purpose) == (
        2,
        "routine",
        "routine",
    )
    assert (reading_set.polarity, reading_set.bias_V, reading_set.attempt) == (1, 300.0, 1)
    assert reading_set.status == "collecting" and reading_set.ended_at is None

    (reading,) = store.readings(session_id)
    assert reading.id == reading_id and reading.charge_nC == 20.512
    assert reading.settling is True and reading.capture == "pushed"
    assert reading.traffic_id == traffic_id

    (env,) = store.environment(session_id)
    assert env.id == env_id
    assert (env.temperature_C, env.pressure_kPa, env.pressure_entered, env.pressure_unit) == (
        21.3,
        101.2,
        1012.0,
        "hPa",
    )
    assert env.humidity_pct == 45.0 and env.source == "operator"

    events = store.events(session_id)
    assert [e.kind for e in events] == [EventKind.SESSION_CREATED, "note"]
    assert events[-1].id == event_id and events[-1].actor == "operator F"
    assert events[-1].detail() == {"text": "chamber swapped"}

    (line,) = store.traffic(session_id)
    assert line.line == b"Q=+20.512E-9 C\r\n" and line.direction == "rx" and line.t_s == 12.5


def test_readings_filter_by_set_and_keep_their_order(store: Store) -> None:
    session_id, first = _session_with_set(store)
    second = store.add_set(session_id, 3, "opposite", "opposite", -1, -300.0, 1)
    for seq, charge in enumerate([20.51, 20.52, 20.50]):
        _reading(store, session_id, first, seq, charge)
    _reading(store, session_id, second, 0, -20.58)
    assert [r.charge_nC for r in store.readings(session_id, first)] == [20.51, 20.52, 20.50]
    assert [r.charge_nC for r in store.readings(session_id, second)] == [-20.58]
    assert len(store.readings(session_id)) == 4


def test_traffic_and_events_outside_a_session(store: Store) -> None:
    store.add_traffic(None, 0.1, "tx", b"*IDN?\n")
    store.add_event(None, "daemon", EventKind.INSTRUMENT_IDENTIFIED, IDENTIFIED)
    assert [t.line for t in store.traffic(None)] == [b"*IDN?\n"]
    assert store.traffic_count(None) == 1
    assert [e.detail() for e in store.events(None)] == [IDENTIFIED]


def test_open_session_is_the_newest_open_one(store: Store) -> None:
    assert store.open_session() is None
    first = store.create_session(METADATA, PLAN, "trs398", "6 MV")
    second = store.create_session(METADATA, PLAN, "tg51", "10 MV")
    assert store.open_session().id == second
    store.set_session_status(second, "finished")
    assert store.open_session().id == first
    store.set_session_status(first, "interrupted", "daemon stopped")
    assert store.open_session() is None
    assert [s.id for s in store.sessions()] == [first, second]


def test_replay_of_must_name_an_existing_session(store: Store) -> None:
    original = store.create_session(METADATA, PLAN, "trs398", "6 MV")
    replay = store.create_session(METADATA, PLAN, "trs398", "6 MV", replay_of=original)
    assert store.session(replay).replay_of == original
    with pytest.raises(NotFound, match="no session with id 42"):
        store.create_session(METADATA, PLAN, "trs398", "6 MV", replay_of=42)
    assert len(store.sessions()) == 2


def test_missing_rows_raise_a_named_key_error(store: Store) -> None:
    with pytest.raises(KeyError):
        store.session(7)
    with pytest.raises(NotFound, match="no reading set with id 3"):
        store.reading_set(3)
    with pytest.raises(NotFound, match="no session with id 9"):
        store.add_environment(9, 20.0, 101.3, 101.3, "kPa", None, "operator")


# ------------------------------------------------------------------ status changes, audit


def test_session_status_changes_are_written_as_events(store: Store) -> None:
    session_id = store.create_session(METADATA, PLAN, "trs398", "6 MV")
    store.set_session_status(session_id, "interrupted", "daemon restarted", actor="daemon")
    interrupted = store.session(session_id)
    assert interrupted.closed_at is not None and interrupted.reason == "daemon restarted"
    store.set_session_status(session_id, "open", "resumed", actor="reviewer B")
    assert store.session(session_id).closed_at is None
    store.set_session_status(session_id, "aborted", "beam fault")
    closed, aborted = interrupted.closed_at, store.session(session_id).closed_at
    changes = [e.detail() for e in store.events(session_id) if e.kind == EventKind.SESSION_STATUS]
    assert changes == [
        {"from": "open", "to": "interrupted", "reason": "daemon restarted", "closed_at": closed},
        {"from": "interrupted", "to": "open", "reason": "resumed", "closed_at": None},
        {"from": "open", "to": "aborted", "reason": "beam fault", "closed_at": aborted},
    ]
    actors = [e.actor for e in store.events(session_id) if e.kind == EventKind.SESSION_STATUS]
    assert actors == ["daemon", "reviewer B", "daemon"]


def test_a_final_session_status_cannot_change(store: Store) -> None:
    session_id = store.create_session(METADATA, PLAN, "trs398", "6 MV")
    store.set_session_status(session_id, "finished")
    events_before = store.events(session_id)
    with pytest.raises(StoreError, match=f"session {session_id} is finished"):
        store.set_session_status(session_id, "open")
    assert store.session(session_id).status == "finished"
    assert store.events(session_id) == events_before
    # The database itself refuses too, whoever writes to it.
    with pytest.raises(sqlite3.IntegrityError, match=r"final|must follow its session_status"):
        store.db.execute("UPDATE sessions SET status = 'open' WHERE id = ?", (session_id,))


def test_set_status_changes_are_written_as_events(store: Store) -> None:
    session_id, set_id = _session_with_set(store)
    store.set_set_status(set_id, "reviewing")
    assert store.reading_set(set_id).ended_at is None
    store.set_set_status(set_id, "accepted")
    accepted_at = store.reading_set(set_id).ended_at
    assert accepted_at is not None
    store.set_set_status(set_id, "superseded", "redo: the operator moved the chamber")
    superseded = store.reading_set(set_id)
    assert superseded.ended_at == accepted_at
    assert superseded.reason == "redo: the operator moved the chamber"
    changes = [(e.detail()["from"], e.detail()["to"]) for e in store.events(session_id)[1:]]
    assert changes == [
        ("collecting", "reviewing"),
        ("reviewing", "accepted"),
        ("accepted", "superseded"),
    ]
    with pytest.raises(StoreError, match="superseded"):
        store.set_set_status(set_id, "accepted")


def test_recorded_facts_of_sessions_and_sets_cannot_change_or_vanish(store: Store) -> None:
    session_id, set_id = _session_with_set(store)
    with pytest.raises(sqlite3.IntegrityError, match="only the status"):
        store.db.execute("UPDATE sessions SET beam = '18 MV' WHERE id = ?", (session_id,))
    with pytest.raises(sqlite3.IntegrityError, match="only the status"):
        store.db.execute("UPDATE reading_sets SET bias_V = 100 WHERE id = ?", (set_id,))
    for table in ("sessions", "reading_sets"):
        with pytest.raises(sqlite3.IntegrityError, match="cannot be deleted"):
            store.db.execute(f"DELETE FROM {table}")
    assert store.session(session_id).beam == "6 MV"
    assert store.reading_set(set_id).bias_V == 300.0


@pytest.mark.parametrize("table", ["readings", "environment", "events", "traffic"])
def test_append_only_tables_refuse_update_and_delete(store: Store, table: str) -> None:
    session_id, set_id = _session_with_set(store)
    _reading(store, session_id, set_id, 0, 20.5)
    store.add_environment(session_id, 20.0, 101.3, 101.3, "kPa", None, "operator")
    store.add_traffic(session_id, 1.0, "rx", b"20.5\n")
    before = list(store.db.query(f"SELECT * FROM {table}"))
    with pytest.raises(sqlite3.IntegrityError, match=f"{table} is append-only"):
        store.db.execute(f"UPDATE {table} SET session_id = session_id")
    with pytest.raises(sqlite3.IntegrityError, match=f"{table} is append-only"):
        store.db.execute(f"DELETE FROM {table}")
    assert list(store.db.query(f"SELECT * FROM {table}")) == before


# ---------------------------------------------------------------------------- bad input


def _holding_itself() -> dict:
    detail: dict = {"text": "x"}
    detail["again"] = detail
    return detail


def test_an_inputs_detail_is_stored_as_pythons_json_writes_it_keys_sorted(store: Store) -> None:
    session_id, _ = _session_with_set(store)
    detail = {"t_s": 0.1 + 0.2, "b": [1, None, "é\n"], "a": {"z": True, "y": 2}}
    store.add_inputs(session_id, [("note", "me", detail)])
    row = store.inputs(session_id)[-1]
    # the reference: Python's json module, with the options the store documents
    written = json.dumps(detail, sort_keys=True, allow_nan=False, ensure_ascii=False)
    assert row.detail_json == written
    assert row.detail() == detail


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (
            lambda s, ses, set_id: s.add_reading(ses, set_id, 1, 1.0, NAN, "auto", 0, "ok"),
            "charge_nC",
        ),
        (
            lambda s, ses, set_id: s.add_reading(ses, set_id, 1, 1.0, 20.0, "guess", 0, "ok"),
            "capture",
        ),
        (lambda s, ses, set_id: s.add_reading(ses, set_id, -1, 1.0, 20.0, "auto", 0, "ok"), "seq"),
        (
            lambda s, ses, set_id: s.add_reading(ses, set_id, 1, 1.0, 20.0, "auto", 2, "ok"),
            "settling",
        ),
        (lambda s, ses, set_id: s.add_reading(ses, set_id, 1, 1.0, 20.0, "auto", 0, ""), "status"),
        (lambda s, ses, set_id: s.add_set(ses, 0, "x", "warmup", 1, -300.0, 1), "bias_V"),
        (lambda s, ses, set_id: s.add_set(ses, 0, "x", "calibrate", 1, 300.0, 1), "purpose"),
        (lambda s, ses, set_id: s.add_set(ses, 0, "x", "routine", 0, 300.0, 1), "polarity"),
        (lambda s, ses, set_id: s.add_set(ses, 0, "x", "routine", 1, 300.0, 0), "attempt"),
        (lambda s, ses, set_id: s.set_set_status(set_id, "done"), "status"),
        (lambda s, ses, set_id: s.set_session_status(ses, "closed"), "status"),
        (lambda s, ses, set_id: s.add_traffic(ses, 1.0, "in", b"x"), "direction"),
        (lambda s, ses, set_id: s.add_traffic(ses, 1.0, "rx", "text"), "line"),
        (lambda s, ses, set_id: s.add_event(ses, "", EventKind.NOTE, {"text": "x"}), "actor"),
        (
            lambda s, ses, set_id: s.add_event(ses, "me", EventKind.NOTE, {"text": float("inf")}),
            "detail",
        ),
        (
            lambda s, ses, set_id: s.add_environment(ses, 20.0, None, 1.0, "kPa", None, "op"),
            "pressure_kPa",
        ),
        (lambda s, ses, set_id: s.create_session({"a": {1, 2}}, {}, "trs398", "6 MV"), "metadata"),
        (lambda s, ses, set_id: s.add_inputs(ses, [("note", "me", _holding_itself())]), "detail"),
        (lambda s, ses, set_id: s.create_session({}, [], "trs398", "6 MV"), "plan"),
    ],
)
def test_bad_input_names_the_field_and_loses_nothing(store: Store, call, field: str) -> None:
    session_id, set_id = _session_with_set(store)
    _reading(store, session_id, set_id, 0, 20.5)
    tables = ("sessions", "reading_sets", "readings", "environment", "events", "traffic")
    before = {t: list(store.db.query(f"SELECT * FROM {t}")) for t in tables}
    with pytest.raises(InputError) as caught:
        call(store, session_id, set_id)
    assert caught.value.field == field
    assert str(caught.value).startswith(field)
    assert {t: list(store.db.query(f"SELECT * FROM {t}")) for t in tables} == before


def test_a_reading_cannot_go_into_another_sessions_set(store: Store) -> None:
    _, set_id = _session_with_set(store)
    other = store.create_session(METADATA, PLAN, "trs398", "6 MV")
    with pytest.raises(InputError, match="belongs to session 1"):
        _reading(store, other, set_id, 0, 20.5)
    assert store.readings(other) == []


@settings(max_examples=60, deadline=None)
@given(
    charge_nC=st.floats(allow_nan=False, allow_infinity=False),
    line=st.binary(min_size=1, max_size=200),
)
def test_charges_and_raw_lines_come_back_bit_for_bit(charge_nC: float, line: bytes) -> None:
    with Store.memory() as store:
        session_id, set_id = _session_with_set(store)
        _reading(store, session_id, set_id, 0, charge_nC)
        store.add_traffic(session_id, 0.0, "rx", line)
        assert store.readings(session_id)[0].charge_nC == charge_nC
        assert store.traffic(session_id)[0].line == line


def test_a_worker_thread_can_record_traffic_while_readings_arrive(store: Store) -> None:
    session_id, set_id = _session_with_set(store)

    def record_lines() -> None:
        for i in range(200):
            store.add_traffic(session_id, float(i), "rx", f"{i}\n".encode())

    worker = threading.Thread(target=record_lines)
    worker.start()
    for seq in range(50):
        _reading(store, session_id, set_id, seq, 20.0 + seq / 1000)
    worker.join()
    assert [t.line for t in store.traffic(session_id)] == [f"{i}\n".encode() for i in range(200)]
    assert store.traffic_count(session_id) == 200
    assert len(store.readings(session_id)) == 50


def test_a_burst_of_raw_lines_is_recorded_in_order_with_the_stamps_given(store: Store) -> None:
    session_id, _ = _session_with_set(store)
    stamps = [store.stamp() for _ in range(3)]  # taken as each line arrived
    lines = [(session_id, float(i), stamps[i], "rx", f"{i}\n".encode()) for i in range(3)]
    assert store.add_traffic_many(lines) == 3
    recorded = store.traffic(session_id)
    assert [(t.t_s, t.line, t.recorded_at) for t in recorded] == [
        (float(i), f"{i}\n".encode(), stamps[i]) for i in range(3)
    ]


def test_a_few_raw_lines_are_read_by_id_and_only_from_their_own_session(store: Store) -> None:
    session_id, _ = _session_with_set(store)
    other_id, _ = _session_with_set(store)
    lines = [(session_id, float(i), store.stamp(), "rx", f"{i}\n".encode()) for i in range(600)]
    store.add_traffic_many([*lines, (other_id, 0.0, store.stamp(), "rx", b"other\n")])
    rows = store.traffic(session_id)
    other_line = store.traffic(other_id)[0].id
    wanted = [rows[3].id, rows[599].id, rows[3].id, other_line, 10**6]
    assert store.traffic_lines(session_id, wanted) == {rows[3].id: b"3\n", rows[599].id: b"599\n"}
    every = store.traffic_lines(session_id, [row.id for row in rows])  # more than one chunk
    assert every == {row.id: row.line for row in rows}


def test_the_quick_stamp_is_the_iso_text_of_now() -> None:
    slack = timedelta(microseconds=1)  # the two clocks may round the same instant apart
    before = datetime.now(UTC)
    stamp = utc_stamp_now()
    after = datetime.now(UTC)
    assert before - slack <= datetime.fromisoformat(stamp) <= after + slack
    assert stamp == datetime.fromisoformat(stamp).isoformat(timespec="microseconds")


def test_a_burst_with_one_bad_line_is_refused_whole(store: Store) -> None:
    session_id, _ = _session_with_set(store)
    good = (session_id, 1.0, store.stamp(), "rx", b"20.5\n")
    bad = (session_id, NAN, store.stamp(), "rx", b"20.6\n")
    with pytest.raises(InputError) as refused:
        store.add_traffic_many([good, bad])
    assert refused.value.field == "t_s"
    assert store.traffic(session_id) == []  # nothing half-written


# ------------------------------------------------------------------ durability and resume

WRITER = textwrap.dedent(
    """
    import os, sys
    from chargebook.acquire.record.store import Store
    store = Store.open(sys.argv[1])
    session_id = store.create_session({"treatment_machine": "DEMO-LA2"}, {"steps": []},
                                      "tg51", "6 MV")
    set_id = store.add_set(session_id, 0, "routine", "routine", 1, 300.0, 1)
    for seq in range(5):
        store.add_traffic(session_id, seq * 1.0, "rx", b"%d\\n" % seq)
        store.add_reading(session_id, set_id, seq, seq * 1.0, 20.5 + seq / 100, "auto",
                          seq == 0, "ok")
        print(seq, flush=True)   # "a client hears of it" only after the commit
    os._exit(9)                  # die without closing: no clean shutdown, no checkpoint
    """
)


def test_a_writer_that_dies_loses_nothing_and_the_session_resumes(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    process = subprocess.Popen(
        [sys.executable, "-c", WRITER, str(path)], stdout=subprocess.PIPE, text=True
    )
    announced: list[int] = []
    for line in process.stdout:
        seq = int(line)
        announced.append(seq)
        # Another connection sees each reading as soon as the writer has announced it.
        with sqlite3.connect(path) as reader:
            count = reader.execute("SELECT count(*) FROM readings").fetchone()[0]
        assert count >= seq + 1
    assert process.wait(timeout=60) == 9
    assert announced == [0, 1, 2, 3, 4]

    with Store.open(path) as restarted:
        session = restarted.open_session()
        assert session is not None and session.metadata() == {"treatment_machine": "DEMO-LA2"}
        readings = restarted.readings(session.id)
        assert [r.seq for r in readings] == announced
        assert [r.charge_nC for r in readings] == [20.5, 20.51, 20.52, 20.53, 20.54]
        assert [r.settling for r in readings] == [True, False, False, False, False]
        assert len(restarted.traffic(session.id)) == 5
        (reading_set,) = restarted.sets(session.id)
        assert reading_set.status == "collecting"


def test_a_concurrent_writer_makes_a_write_wait_not_fail(tmp_path: Path) -> None:
    # Another process (a replay, a reviewer's tool) commits while the daemon writes: a
    # deferred transaction that read first failed at once with "database is locked" and the
    # daemon dropped raw lines. An immediate one waits for the lock (SQLite's busy timeout).
    path = tmp_path / "station.sqlite"
    store = Store.open(path)
    session_id, _ = _session_with_set(store)
    holding, other_done = threading.Event(), threading.Event()

    def other_writer() -> None:
        conn = sqlite3.connect(path)
        conn.execute("BEGIN IMMEDIATE")
        conn.execute(
            "INSERT INTO traffic (session_id, t_s, recorded_at, direction, line, chain_seq, "
            "chain_hash) VALUES (NULL, 0, '2026-12-02T00:00:00+00:00', 'rx', x'30', 1, 'x')"
        )
        holding.set()
        other_done.wait(0.5)  # hold the write lock half a second, then commit
        conn.commit()
        conn.close()

    writer = threading.Thread(target=other_writer)
    writer.start()
    holding.wait(5)
    line = (session_id, 1.0, store.stamp(), "rx", b"1\n")
    assert store.add_traffic_many([line]) == 1  # waited for the other writer, then committed
    writer.join()
    assert store.traffic_count(session_id) == 1 and store.traffic_count(None) == 1
    store.close()


def test_a_kept_line_is_told_its_row_id_when_written_and_none_when_its_commit_fails(
    store: Store,
) -> None:
    session_id, _ = _session_with_set(store)
    told: dict[str, list[int | None]] = {"first": [], "second": []}
    store.keep_traffic((session_id, 1.0, store.stamp(), "rx", b"20.1\n"), told["first"].append)
    store.keep_traffic((session_id, 2.0, store.stamp(), "tx", b"Q?\n"))  # nobody asks its id
    store.keep_traffic((session_id, 2.0, store.stamp(), "rx", b"20.2\n"), told["second"].append)
    with pytest.raises(InputError), store.atomic():  # a transaction that fails after the write
        store.add_event(session_id, "daemon", EventKind.NOTE, {"text": float("nan")})
    assert told == {"first": [told["first"][0], None], "second": [told["second"][0], None]}
    store.commit_traffic()
    rows = {row.id: row.line for row in store.traffic(session_id)}
    assert rows[told["first"][-1]] == b"20.1\n"
    assert rows[told["second"][-1]] == b"20.2\n"


def test_committed_events_are_handed_over_once_in_order_and_rolled_back_ones_never(
    store: Store,
) -> None:
    session_id, set_id = _session_with_set(store)
    told: list[list[tuple[int, str]]] = []
    store.on_events_committed = lambda events: told.append([(e.id, e.kind) for e in events])
    with store.atomic():
        first = store.add_event(session_id, "operator A", "note", {"text": "kept"})
        with pytest.raises(InputError), store.atomic():  # a savepoint that fails
            store.add_event(session_id, "operator A", "lost", {"text": "rolled back"})
            store.add_event(session_id, "operator A", "bad", {"value": NAN})
        assert told == []  # nothing is told before the commit
        store.set_set_status(set_id, "reviewing", actor="operator A")
    with pytest.raises(InputError), store.atomic():  # a transaction that fails whole
        store.add_event(session_id, "operator A", "gone", {"text": "rolled back"})
        store.add_event(session_id, "operator A", "bad", {"value": NAN})
    recorded = [(e.id, e.kind) for e in store.events(session_id)]
    assert told == [[(first, "note"), recorded[-1]]]
    assert recorded[-2:] == told[0]  # as committed: the same ids and kinds, in order
    assert [e for e in store.events(session_id) if e.kind in ("lost", "gone")] == []


def test_remembered_rows_are_the_rows_recorded_after_new_rows_status_changes_and_rollbacks(
    store: Store,
) -> None:
    store.remember_rows()
    session_id, first = _session_with_set(store)
    other_session, other_set = _session_with_set(store)  # rows of another session between
    _reading(store, session_id, first, 1, 20.01)
    assert store.sets(session_id)[0].status == "collecting"
    _reading(store, other_session, other_set, 1, 19.99)
    store.set_set_status(first, "superseded", "cable moved")
    second = store.add_set(session_id, 2, "routine", "routine", 1, 300.0, 2)
    _reading(store, session_id, second, 1, 20.02)
    with pytest.raises(InputError), store.atomic():  # rolled back: never recorded
        _reading(store, session_id, second, 2, 20.03)
        store.sets(session_id), store.readings(session_id)  # read inside the transaction
        _reading(store, session_id, second, 3, NAN)
    grouped = store.readings_by_set(session_id)
    _reading(store, session_id, second, 2, 20.04)
    fresh = Store(store.conn, None)  # the same file read afresh, nothing remembered
    assert store.sets(session_id) == fresh.sets(session_id)
    assert [s.status for s in store.sets(session_id)] == ["superseded", "collecting"]
    assert store.readings(session_id) == fresh.readings(session_id)
    assert [r.charge_nC for r in store.readings(session_id)] == [20.01, 20.02, 20.04]
    assert store.readings_by_set(session_id) == fresh.readings_by_set(session_id)
    assert store.readings_by_set(session_id)[first] is grouped[first]  # no reading since


def test_some_sessions_are_read_whole_in_the_order_recorded(store: Store) -> None:
    # history reads the whole rows of one beam's sessions only, not of the station's thousands
    ids = [
        store.create_session({"beam": beam}, {"steps": []}, "TRS-398", beam)
        for beam in ("6 MV", "10 MV", "6 MV")
    ]
    every = {row.id: row for row in store.sessions()}
    assert store.sessions_of([ids[2], ids[0]]) == [every[ids[0]], every[ids[2]]]
    assert store.sessions_of(iter([ids[1], 10**6, ids[1]])) == [every[ids[1]]]  # once each
    assert store.sessions_of([]) == []


def test_session_names_are_what_the_decoded_metadata_names(store: Store) -> None:
    # The listing reads the machine, beam and operator with SQLite's JSON functions instead of
    # decoding each session's metadata: it must find what the decoded metadata holds.
    from chargebook.acquire.record.store import NAMED_KEYS, names_in

    given = [
        {"treatment_machine": "LA 1", "beam": "6 MV", "operator": "operator A"},
        {"treatment_machine": "Ünïcode \x1b[2J", "beam": '10 "FFF" \\ MV'},  # no operator
        {"treatment_machine": None, "beam": "6 MV", "operator": "B"},
        {"treatment_machine": "LA 2", "beam": 6, "operator": "B"},  # not text: decoded instead
    ]
    ids = [store.create_session(meta, {"steps": []}, "TRS-398", "6 MV") for meta in given]
    names = store.session_names()
    for session_id, meta in zip(ids[:3], given[:3], strict=True):
        assert names[session_id] == {k: meta[k] for k in NAMED_KEYS if k in meta}
        assert names[session_id] == {
            k: v for k, v in store.session(session_id).metadata().items() if k in NAMED_KEYS
        }
    assert ids[3] not in names
    # A listing reads the same names with each session's row, without its metadata or plan.
    listed = {session.id: session for session in store.listed_sessions()}
    for session_id, meta in zip(ids, given, strict=True):
        row, names_read = store.session(session_id), names_in(meta)
        assert listed[session_id].names == names_read == names.get(session_id)
        assert (listed[session_id].status, listed[session_id].beam) == (row.status, row.beam)
        assert (listed[session_id].uuid, listed[session_id].created_at) == (
            row.uuid,
            row.created_at,
        )
